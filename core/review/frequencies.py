"""Frequencies of the weights of a sequence, and pairs of modes that travel together.

When the images are frames of a sequence in time (a video, snapshots of a flow), the weights of
each mode (``decomposition.weights[j]``, one value per frame, in frame order) are a time series.
This module reads three things from them:

* the **spectrum** of each mode's weights: :func:`scipy.signal.periodogram` with a Hann window
  after removing a straight-line trend (``detrend="linear"``), one-sided, as a power spectrum;
* the **dominant frequency** of each mode (the largest bin above zero frequency) and its
  **power share**: the power within one bin either side of that peak over the power of every
  bin above zero (a Hann window spreads a pure tone over the peak and its two neighbours, so
  a pure tone gives a share near 1, white noise about ``3 / bins``);
* **pairs** of modes: a wave that travels across the images appears as two modes with nearly
  equal singular values whose weights oscillate at the same frequency a quarter period apart
  (for ``cos(k x - w t) = cos(k x) cos(w t) + sin(k x) sin(w t)`` the basis images are
  ``cos(k x)`` and ``sin(k x)`` and the weights ``cos(w t)`` and ``sin(w t)``: the known result
  of proper orthogonal decomposition of travelling waves). Two modes ``a < b`` are paired when
  all of these hold:

  - the smaller singular value is at least :data:`SV_RATIO_MIN` times the larger (common
    practice, no source: pairs split by noise and by a window that is not a whole number of
    periods);
  - their dominant frequencies are within one bin of each other and above zero;
  - the phase of the cross spectrum (:func:`scipy.signal.csd`, whole series, Hann window) at
    the common peak is within :data:`PHASE_TOLERANCE` degrees of +90 or -90 (rule of thumb);
  - the magnitude-squared coherence (:func:`scipy.signal.coherence`, Welch segments of a quarter
    of the series, half overlapping) at the common peak is at least :data:`COHERENCE_MIN`
    (common practice, no source). Coherence needs several segments, so no pair is reported for
    a series shorter than :data:`MIN_FRAMES_FOR_PAIRS` frames.

  Each mode joins at most one pair; candidates are taken by closeness of their singular values.

Frequencies are in Hz when the frame rate is known (``metadata["frame_rate"]`` of the analysis,
or given); otherwise the frame rate is taken as 1 and frequencies are in cycles per frame.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.validation import check_bool, check_float, check_int, check_instance

__all__ = ["FrequencyReport", "ModePair", "weight_spectra", "mode_frequencies",
           "frequencies_of", "frame_rate_of", "write_frequencies_csv", "CSV_COLUMNS",
           "SV_RATIO_MIN", "PHASE_TOLERANCE", "COHERENCE_MIN", "MIN_FRAMES",
           "MIN_FRAMES_FOR_PAIRS"]

#: Smallest ratio (smaller / larger) of the singular values of a pair (common practice).
SV_RATIO_MIN = 0.8
#: Largest distance, in degrees, of a pair's phase lag from +90 or -90 (rule of thumb).
PHASE_TOLERANCE = 30.0
#: Smallest magnitude-squared coherence of a pair at its common peak (common practice).
COHERENCE_MIN = 0.8
#: Fewest frames for a spectrum.
MIN_FRAMES = 4
#: Fewest frames for pairs: coherence needs Welch segments of at least 8 frames, and a quarter
#: of the series per segment gives 7 half-overlapping segments (rule of thumb).
MIN_FRAMES_FOR_PAIRS = 32
#: Columns of the CSV written by :func:`write_frequencies_csv`.
CSV_COLUMNS = ("mode", "singular_value", "dominant_frequency", "power_share", "pair")


@dataclass(frozen=True)
class ModePair:
    """Two modes whose weights oscillate together a quarter period apart.

    Attributes
    ----------
    modes : tuple of int
        The two modes, 0-based, smaller number first.
    frequency : float
        The common peak (mean of the two dominant frequencies), in :attr:`FrequencyReport.unit`.
    phase_lag : float
        Phase of the second mode's weights relative to the first's at the peak, in degrees,
        in (-180, 180]: near +90 or -90 for a pair.
    coherence : float
        Magnitude-squared coherence at the peak, in [0, 1].
    singular_value_ratio : float
        Smaller singular value over the larger, in (0, 1].
    """

    modes: tuple
    frequency: float
    phase_lag: float
    coherence: float
    singular_value_ratio: float


@dataclass(frozen=True)
class FrequencyReport:
    """Spectra, dominant frequencies and pairs of the leading modes' weights.

    Attributes
    ----------
    frame_rate : float
        Frames per unit time used (1.0 when unknown).
    rate_known : bool
        True when the frame rate came from the analysis or was given.
    unit : str
        "Hz" when the rate is known, else "cycles per frame".
    frequencies : ndarray, shape (bins,)
        Frequencies of the spectrum bins, 0 .. frame_rate / 2.
    spectra : ndarray, shape (k, bins)
        Power spectrum of each mode's detrended weights.
    resolution : float
        Width of one bin: ``frame_rate / frames``.
    singular_values : ndarray, shape (k,)
    dominant : ndarray, shape (k,)
        Dominant frequency of each mode (NaN when its weights are constant).
    power_share : ndarray, shape (k,)
        Share of the mode's power within one bin of its dominant frequency, in [0, 1].
    pair_of : ndarray, shape (k,), int
        The other mode of each mode's pair, 0-based, or -1.
    pairs : tuple of ModePair
    pairs_note : str
        Why no pairs were looked for (too few frames), else "".
    """

    frame_rate: float
    rate_known: bool
    unit: str
    frequencies: np.ndarray
    spectra: np.ndarray
    resolution: float
    singular_values: np.ndarray
    dominant: np.ndarray
    power_share: np.ndarray
    pair_of: np.ndarray
    pairs: tuple
    pairs_note: str = ""

    @property
    def rank(self) -> int:
        """Number of modes analysed."""
        return int(self.singular_values.shape[0])

    @property
    def n_frames(self) -> int:
        """Number of frames (length of each weights series)."""
        return int(round(self.frame_rate / self.resolution))


def _check_weights(weights) -> np.ndarray:
    if not isinstance(weights, np.ndarray):
        raise TypeError(f"weights must be a numpy array, got {type(weights).__name__}")
    if weights.ndim != 2:
        raise ValueError(f"weights must have shape (modes, frames), got shape {weights.shape}")
    if weights.shape[1] < MIN_FRAMES:
        raise ValueError(f"weights must have at least {MIN_FRAMES} frames for a spectrum, got "
                         f"{weights.shape[1]}")
    if not np.all(np.isfinite(weights)):
        raise ValueError("weights must be finite, found NaN or infinite values")
    return np.asarray(weights, dtype=np.float64)


def weight_spectra(weights: np.ndarray, frame_rate: float = 1.0):
    """Return the power spectrum of each row of ``weights``.

    :func:`scipy.signal.periodogram` with a Hann window, a straight-line trend removed, one
    side, ``scaling="spectrum"``.

    Parameters
    ----------
    weights : ndarray, shape (k, frames)
        One time series per row, in frame order, at least :data:`MIN_FRAMES` frames.
    frame_rate : float, default 1.0
        Frames per unit time (Hz); frequencies come out in the same unit.

    Returns
    -------
    frequencies : ndarray, shape (frames // 2 + 1,)
    spectra : ndarray, shape (k, frames // 2 + 1)

    Raises
    ------
    TypeError
        If ``weights`` is not an array or ``frame_rate`` not a number.
    ValueError
        If ``weights`` is not 2-D, too short or not finite, or ``frame_rate`` is not positive.
    """
    from scipy import signal

    w = _check_weights(weights)
    fs = check_float("frame_rate", frame_rate, low=0.0, low_open=True)
    freqs, psd = signal.periodogram(w, fs=fs, window="hann", detrend="linear",
                                    scaling="spectrum", axis=-1)
    return freqs, psd


def _peaks(spectra: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the peak bin (above zero) of each spectrum and the share of power around it."""
    k, bins = spectra.shape
    above = spectra[:, 1:]
    peak = np.argmax(above, axis=1) + 1
    total = above.sum(axis=1)
    share = np.zeros(k)
    for j in range(k):
        lo, hi = max(1, peak[j] - 1), min(bins, peak[j] + 2)
        share[j] = spectra[j, lo:hi].sum() / total[j] if total[j] > 0 else 0.0
    return peak, np.clip(share, 0.0, 1.0)


def _pair_measures(wa: np.ndarray, wb: np.ndarray, fs: float, f: float) -> tuple[float, float]:
    """Return the phase lag (degrees) and coherence of ``wb`` against ``wa`` at frequency f."""
    from scipy import signal

    n = wa.shape[0]
    freqs, pxy = signal.csd(wa, wb, fs=fs, window="hann", nperseg=n, detrend="linear")
    phase = float(np.degrees(np.angle(pxy[int(np.argmin(np.abs(freqs - f)))])))
    seg = max(8, n // 4)
    cf, coh = signal.coherence(wa, wb, fs=fs, window="hann", nperseg=seg, noverlap=seg // 2,
                               detrend="linear")
    return phase, float(coh[int(np.argmin(np.abs(cf - f)))])


def _find_pairs(w, s, fs, freqs, peak, constant, sv_ratio_min, phase_tolerance,
                coherence_min) -> list[ModePair]:
    k = s.shape[0]
    candidates = []
    for a in range(k):
        for b in range(a + 1, k):
            if constant[a] or constant[b] or abs(int(peak[a]) - int(peak[b])) > 1:
                continue
            ratio = min(s[a], s[b]) / max(s[a], s[b]) if max(s[a], s[b]) > 0 else 0.0
            if ratio < sv_ratio_min:
                continue
            candidates.append((1.0 - ratio, a, b))
    pairs, used = [], set()
    for _, a, b in sorted(candidates):
        if a in used or b in used:
            continue
        f = 0.5 * (freqs[peak[a]] + freqs[peak[b]])
        phase, coherence = _pair_measures(w[a], w[b], fs, f)
        if abs(abs(phase) - 90.0) > phase_tolerance or coherence < coherence_min:
            continue
        ratio = min(s[a], s[b]) / max(s[a], s[b])
        pairs.append(ModePair((a, b), float(f), phase, coherence, float(ratio)))
        used.update((a, b))
    return sorted(pairs, key=lambda p: p.modes)


def mode_frequencies(weights: np.ndarray, singular_values: np.ndarray, *,
                     frame_rate: float | None = None, sv_ratio_min: float = SV_RATIO_MIN,
                     phase_tolerance: float = PHASE_TOLERANCE,
                     coherence_min: float = COHERENCE_MIN) -> FrequencyReport:
    """Find the dominant frequency of each mode's weights and the pairs of modes.

    Parameters
    ----------
    weights : ndarray, shape (k, frames)
        Weights of the leading k modes, one row per mode, frames in time order.
    singular_values : ndarray, shape (k,)
        Singular values of the same modes (non-negative).
    frame_rate : float, optional
        Frames per second. None: unknown, frequencies are then in cycles per frame.
    sv_ratio_min : float, default :data:`SV_RATIO_MIN`
        Smallest ratio of a pair's singular values, in (0, 1].
    phase_tolerance : float, default :data:`PHASE_TOLERANCE`
        Largest distance of a pair's phase lag from +/-90 degrees, in [0, 90].
    coherence_min : float, default :data:`COHERENCE_MIN`
        Smallest coherence of a pair at its peak, in [0, 1].

    Returns
    -------
    FrequencyReport

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If the shapes do not match, the weights are too short or not finite, or a threshold
        is out of range.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(64)
    >>> w = np.vstack([np.cos(2 * np.pi * t / 8), np.sin(2 * np.pi * t / 8)])
    >>> r = mode_frequencies(w, np.array([1.0, 1.0]))
    >>> float(r.dominant[0]), r.pairs[0].modes
    (0.125, (0, 1))
    """
    w = _check_weights(weights)
    s = np.asarray(check_instance("singular_values", singular_values, np.ndarray), float)
    if s.shape != (w.shape[0],):
        raise ValueError(f"singular_values must have shape ({w.shape[0]},) to match weights, "
                         f"got {s.shape}")
    known = frame_rate is not None
    fs = check_float("frame_rate", frame_rate, low=0.0, low_open=True) if known else 1.0
    ratio_min = check_float("sv_ratio_min", sv_ratio_min, low=0.0, high=1.0, low_open=True)
    tol = check_float("phase_tolerance", phase_tolerance, low=0.0, high=90.0)
    coh_min = check_float("coherence_min", coherence_min, low=0.0, high=1.0)
    freqs, spectra = weight_spectra(w, fs)
    peak, share = _peaks(spectra)
    constant = spectra[:, 1:].sum(axis=1) <= 0
    dominant = np.where(constant, np.nan, freqs[peak])
    share[constant] = 0.0
    pair_of = np.full(w.shape[0], -1, dtype=np.int64)
    pairs, note = [], ""
    if w.shape[1] < MIN_FRAMES_FOR_PAIRS:
        note = (f"pairs need at least {MIN_FRAMES_FOR_PAIRS} frames for the coherence, "
                f"found {w.shape[1]}")
    elif w.shape[0] >= 2:
        pairs = _find_pairs(w, s, fs, freqs, peak, constant, ratio_min, tol, coh_min)
    for p in pairs:
        pair_of[p.modes[0]], pair_of[p.modes[1]] = p.modes[1], p.modes[0]
    return FrequencyReport(frame_rate=fs, rate_known=known,
                           unit="Hz" if known else "cycles per frame", frequencies=freqs,
                           spectra=spectra, resolution=float(freqs[1] - freqs[0]),
                           singular_values=s.copy(), dominant=dominant, power_share=share,
                           pair_of=pair_of, pairs=tuple(pairs), pairs_note=note)


def frame_rate_of(decomposition: Decomposition) -> float | None:
    """Return the frame rate stored with an analysis (``metadata["frame_rate"]``, Hz) or None.

    Parameters
    ----------
    decomposition : Decomposition

    Returns
    -------
    float or None
        None when the analysis does not know its frame rate (or holds an unusable value).

    Raises
    ------
    TypeError
        If ``decomposition`` is not a Decomposition.
    """
    check_instance("decomposition", decomposition, Decomposition)
    rate = decomposition.metadata.get("frame_rate")
    if isinstance(rate, bool) or not isinstance(rate, (int, float)):
        return None
    rate = float(rate)
    return rate if np.isfinite(rate) and rate > 0 else None


def frequencies_of(decomposition: Decomposition, rank: int | None = None,
                   frame_rate: float | None = None, **thresholds) -> FrequencyReport:
    """Find the frequencies and pairs of the leading modes of an analysis.

    Parameters
    ----------
    decomposition : Decomposition
        Its images are frames of a sequence, in time order (column order).
    rank : int, optional
        Number of leading modes, 1..k (default: all k).
    frame_rate : float, optional
        Frames per second; overrides the analysis' own (``metadata["frame_rate"]``). When
        neither is known, frequencies are in cycles per frame.
    **thresholds
        ``sv_ratio_min``, ``phase_tolerance``, ``coherence_min`` of :func:`mode_frequencies`.

    Returns
    -------
    FrequencyReport

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``rank`` is out of range, the analysis has no modes or fewer than
        :data:`MIN_FRAMES` images, or a threshold is out of range.
    """
    check_instance("decomposition", decomposition, Decomposition)
    if decomposition.rank == 0:
        raise ValueError("decomposition has no modes; frequencies need at least one")
    k = decomposition.rank if rank is None else check_int("rank", rank, minimum=1,
                                                           maximum=decomposition.rank)
    rate = frame_rate_of(decomposition) if frame_rate is None else frame_rate
    return mode_frequencies(decomposition.weights[:k], decomposition.singular_values[:k],
                            frame_rate=rate, **thresholds)


def write_frequencies_csv(path, report: FrequencyReport, *, overwrite: bool = False,
                          protect=()) -> Path:
    """Write one row per mode through the atomic writer.

    Columns :data:`CSV_COLUMNS`: ``mode`` (1-based), ``singular_value``,
    ``dominant_frequency`` (in the report's unit; empty for constant weights), ``power_share``
    (0..1) and ``pair`` (the other mode's 1-based number, empty when none). Numbers are written
    so they read back exactly.

    Parameters
    ----------
    path : str or os.PathLike
        File to write.
    report : FrequencyReport
    overwrite : bool, default False
        Replace an existing file.
    protect : iterable of str or os.PathLike
        The analysis' sources and model file: never replaced.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    TypeError
        If ``report`` is not a FrequencyReport or ``overwrite`` not a bool.
    DestinationError
        If ``path`` exists and ``overwrite`` is False, is protected, or cannot be written.
    """
    from modescope.core.output.atomic import atomic_writer

    check_instance("report", report, FrequencyReport)
    overwrite = check_bool("overwrite", overwrite)
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    for j in range(report.rank):
        f = report.dominant[j]
        writer.writerow([j + 1, repr(float(report.singular_values[j])),
                         "" if np.isnan(f) else repr(float(f)),
                         repr(float(report.power_share[j])),
                         "" if report.pair_of[j] < 0 else int(report.pair_of[j]) + 1])
    with atomic_writer(path, "w", overwrite, encoding="utf-8", newline="", fsync=True,
                       protect=protect) as fh:
        fh.write(buf.getvalue())
    return Path(path)
