"""Reduced-order dynamics of a sequence: exact dynamic mode decomposition of the weights.

The weights of the leading k modes, one column per frame (``x_t = weights[:k, t]``), are fitted
by a linear one-step model ``x_{t+1} ~= A x_t``. Exact DMD (Schmid 2010, "Dynamic mode
decomposition of numerical and experimental data", J. Fluid Mech. 656; Tu, Rowley, Luchtenburg,
Brunton and Kutz 2014, "On dynamic mode decomposition: theory and applications", J. Comput.
Dyn. 1, Algorithm 2):

1. ``X = [x_0 .. x_{m-1}]``, ``Y = [x_1 .. x_m]``; thin SVD ``X = U S V*``, keeping the singular
   values above ``rcond`` times the largest;
2. ``Ã = U* Y V S^-1``; its eigenvalues ``λ`` and eigenvectors ``w``;
3. exact modes ``Φ = Y V S^-1 w / λ``; amplitudes ``b`` solve ``Φ b = x_0`` (least squares).

Each discrete eigenvalue gives a continuous one, ``ω = log(λ) * frame_rate``: the **growth
rate** ``Re ω`` (1/s; negative for decay) and the **frequency** ``Im ω / 2π`` (Hz). Without a
frame rate both are per frame.

The weights of a mean-centred analysis have their mean over the frames removed, so a decaying
or growing pattern appears with a constant offset, which no linear model ``x_{t+1} = A x_t`` can
follow. With ``offset=True`` (the default) a constant row of ones is added to the state (the
affine model ``x_{t+1} = A x_t + c``); its eigenvalue 1 is reported once, marked as the offset.

A linear model is meaningful only when its one-step fit is good and the frames are equally
spaced in time; :func:`caution` words the checks (see :data:`RESIDUAL_LIMIT` and
:data:`STEPS_PER_STATE`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.validation import check_bool, check_float, check_instance, check_int

__all__ = ["DynamicsReport", "dmd", "dynamics_of", "caution", "RESIDUAL_LIMIT",
           "STEPS_PER_STATE", "MIN_FRAMES"]

#: A one-step fit that leaves more than this share of ``||Y||`` unexplained is called poor
#: (rule of thumb, no source).
RESIDUAL_LIMIT = 0.1
#: Fewer one-step pairs than this many per state dimension are called too few frames (rule of
#: thumb, no source: the fit has state x state unknowns).
STEPS_PER_STATE = 4
#: Fewest frames accepted at all.
MIN_FRAMES = 3


@dataclass(frozen=True)
class DynamicsReport:
    """The linear one-step model of the weights and its eigenvalues.

    Eigenvalues are ordered by amplitude, largest first.

    Attributes
    ----------
    eigenvalues : ndarray, shape (r,), complex
        Discrete-time eigenvalues λ (per frame).
    frequencies : ndarray, shape (r,)
        ``angle(λ) * frame_rate / 2π``, in :attr:`unit` (negative for the conjugate partner).
    growth_rates : ndarray, shape (r,)
        ``log|λ| * frame_rate``, per second (per frame when the rate is unknown).
    amplitudes : ndarray, shape (r,)
        ``|b|``: how much of the first frame's state each eigenvalue carries.
    modes : ndarray, shape (k, r), complex
        Exact DMD modes over the k weights (the offset row left out).
    is_offset : ndarray, shape (r,), bool
        True for the eigenvalue of the constant offset (only with ``offset=True``).
    residual : float
        ``||Y - A X||_F / ||Y||_F`` of the one-step fit (A restricted to the kept directions).
    frame_rate : float
    rate_known : bool
    unit : str
        "Hz" or "cycles per frame".
    rate_unit : str
        "1/s" or "1/frame".
    n_frames : int
    n_states : int
        Dimension of the state fitted: k, plus 1 with the offset.
    uniform_steps : bool
        False when the frame times given were not equally spaced.
    """

    eigenvalues: np.ndarray
    frequencies: np.ndarray
    growth_rates: np.ndarray
    amplitudes: np.ndarray
    modes: np.ndarray
    is_offset: np.ndarray
    residual: float
    frame_rate: float
    rate_known: bool
    unit: str
    rate_unit: str
    n_frames: int
    n_states: int
    uniform_steps: bool = True

    @property
    def oscillations(self) -> np.ndarray:
        """Indices of the eigenvalues to list: no offset, and of each conjugate pair only the
        one with a non-negative frequency."""
        keep = ~self.is_offset & (self.frequencies >= 0)
        return np.flatnonzero(keep)


def _check_times(times, n: int) -> bool:
    """Return True when ``times`` (or None) are equally spaced within 1e-6 relative."""
    if times is None:
        return True
    t = np.asarray(times, dtype=np.float64)
    if t.shape != (n,):
        raise ValueError(f"times must have shape ({n},) to match the frames, got {t.shape}")
    steps = np.diff(t)
    if not np.all(np.isfinite(steps)) or np.any(steps <= 0):
        raise ValueError("times must be finite and strictly increasing")
    return bool(np.ptp(steps) <= 1e-6 * np.mean(steps))


def _exact_dmd(x: np.ndarray, y: np.ndarray, rcond: float):
    """Return eigenvalues, exact modes and the one-step residual (Tu et al. 2014, Alg. 2)."""
    u, s, vh = np.linalg.svd(x, full_matrices=False)
    keep = s > rcond * s[0] if s.size and s[0] > 0 else np.zeros(s.shape, bool)
    if not np.any(keep):
        raise ValueError("weights are all zero: no dynamics to fit")
    u, s, v = u[:, keep], s[keep], vh[keep].conj().T
    yvs = y @ v / s[None, :]
    atilde = u.conj().T @ yvs
    lam, w = np.linalg.eig(atilde)
    safe = np.where(np.abs(lam) > 0, lam, 1.0)
    phi = (yvs @ w) / safe[None, :]
    fitted = yvs @ (u.conj().T @ x)              # A X with A = Y V S^-1 U*
    norm = np.linalg.norm(y)
    residual = float(np.linalg.norm(y - fitted) / norm) if norm > 0 else 0.0
    return lam, phi, residual


def dmd(weights: np.ndarray, *, frame_rate: float | None = None, offset: bool = True,
        times=None, rcond: float = 1e-10) -> DynamicsReport:
    """Fit a linear one-step model to a multivariate time series by exact DMD.

    Parameters
    ----------
    weights : ndarray, shape (k, frames)
        One row per mode, frames in time order, at least :data:`MIN_FRAMES` frames.
    frame_rate : float, optional
        Frames per second; None: unknown (frequencies per frame, growth rates per frame).
    offset : bool, default True
        Add a constant row to fit ``x_{t+1} = A x_t + c`` (for mean-centred weights).
    times : array_like, shape (frames,), optional
        Times of the frames, if known; only used to tell whether the steps are equal (DMD
        assumes they are).
    rcond : float, default 1e-10
        Directions of ``X`` with singular values below ``rcond`` times the largest are dropped.

    Returns
    -------
    DynamicsReport

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``weights`` is not 2-D, too short, not finite or all zero; ``frame_rate`` or
        ``rcond`` is not positive; ``times`` do not match the frames or do not increase.

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(50) / 10.0
    >>> w = np.exp(-0.5 * t) * np.vstack([np.cos(2 * np.pi * t), np.sin(2 * np.pi * t)])
    >>> r = dmd(w, frame_rate=10.0, offset=False)
    >>> np.round(r.growth_rates[r.oscillations], 6), np.round(r.frequencies[r.oscillations], 6)
    (array([-0.5]), array([1.]))
    """
    if not isinstance(weights, np.ndarray):
        raise TypeError(f"weights must be a numpy array, got {type(weights).__name__}")
    if weights.ndim != 2:
        raise ValueError(f"weights must have shape (modes, frames), got shape {weights.shape}")
    if weights.shape[1] < MIN_FRAMES or weights.shape[0] < 1:
        raise ValueError(f"weights must have at least 1 mode and {MIN_FRAMES} frames, got "
                         f"shape {weights.shape}")
    if not np.all(np.isfinite(weights)):
        raise ValueError("weights must be finite, found NaN or infinite values")
    known = frame_rate is not None
    fs = check_float("frame_rate", frame_rate, low=0.0, low_open=True) if known else 1.0
    offset = check_bool("offset", offset)
    rcond = check_float("rcond", rcond, low=0.0, low_open=True)
    k, n = weights.shape
    uniform = _check_times(times, n)
    state = np.asarray(weights, dtype=np.float64)
    if offset:
        scale = float(np.sqrt(np.mean(state ** 2))) or 1.0   # keep the ones row in scale
        state = np.vstack([state, np.full((1, n), scale)])
    lam, phi, residual = _exact_dmd(state[:, :-1], state[:, 1:], rcond)
    b = np.linalg.lstsq(phi, state[:, 0].astype(complex), rcond=None)[0]
    is_off = np.zeros(lam.shape, dtype=bool)
    if offset:
        share = np.abs(phi[-1]) / np.maximum(np.linalg.norm(phi, axis=0), 1e-300)
        is_off[int(np.argmax(share))] = True
    order = np.argsort(-np.abs(b), kind="stable")
    lam, phi, b, is_off = lam[order], phi[:, order], b[order], is_off[order]
    with np.errstate(divide="ignore"):
        logs = np.log(lam.astype(complex))
    return DynamicsReport(
        eigenvalues=lam, frequencies=logs.imag * fs / (2 * np.pi), growth_rates=logs.real * fs,
        amplitudes=np.abs(b), modes=phi[:k], is_offset=is_off, residual=residual,
        frame_rate=fs, rate_known=known, unit="Hz" if known else "cycles per frame",
        rate_unit="1/s" if known else "1/frame", n_frames=n, n_states=state.shape[0],
        uniform_steps=uniform)


def dynamics_of(decomposition: Decomposition, rank: int | None = None,
                frame_rate: float | None = None, *, offset: bool = True) -> DynamicsReport:
    """Fit the linear one-step model to the leading weights of an analysis of a sequence.

    The frame numbers of the images (``decomposition.pages`` when every image comes from one
    file, a video or an array stack) are taken as the frame times, so skipped frames are
    noticed; separate image files are taken as equally spaced.

    Parameters
    ----------
    decomposition : Decomposition
        Its images are frames in time order (column order).
    rank : int, optional
        Number of leading modes, 1..k (default: all).
    frame_rate : float, optional
        Frames per second; overrides ``metadata["frame_rate"]`` of the analysis.
    offset : bool, default True
        See :func:`dmd`.

    Returns
    -------
    DynamicsReport

    Raises
    ------
    TypeError
        If an argument has the wrong type.
    ValueError
        If ``rank`` is out of range, or the analysis has no modes or too few images.
    """
    from modescope.core.review.frequencies import frame_rate_of

    check_instance("decomposition", decomposition, Decomposition)
    if decomposition.rank == 0:
        raise ValueError("decomposition has no modes; dynamics need at least one")
    k = decomposition.rank if rank is None else check_int("rank", rank, minimum=1,
                                                           maximum=decomposition.rank)
    rate = frame_rate_of(decomposition) if frame_rate is None else frame_rate
    times = None
    paths = decomposition.paths
    if paths and len(set(paths)) == 1:
        pages = np.asarray(decomposition.pages, dtype=np.float64)
        if np.all(np.diff(pages) > 0):
            times = pages
    return dmd(decomposition.weights[:k], frame_rate=rate, offset=offset, times=times)


def caution(report: DynamicsReport) -> list[str]:
    """Return the reasons, in plain words, to distrust the linear model (empty when none).

    Checks: the one-step residual against :data:`RESIDUAL_LIMIT`; the number of one-step pairs
    against :data:`STEPS_PER_STATE` per state dimension; equal time steps; growing eigenvalues;
    an unknown frame rate.

    Parameters
    ----------
    report : DynamicsReport

    Returns
    -------
    list of str

    Raises
    ------
    TypeError
        If ``report`` is not a DynamicsReport.
    """
    check_instance("report", report, DynamicsReport)
    notes = []
    if report.residual > RESIDUAL_LIMIT:
        notes.append(f"the one-step linear fit leaves {100 * report.residual:.0f} % of the next "
                     f"frame's weights unexplained (more than {100 * RESIDUAL_LIMIT:.0f} %): the "
                     "weights do not follow a linear model well; treat the rates as rough")
    steps = report.n_frames - 1
    if steps < STEPS_PER_STATE * report.n_states:
        notes.append(f"only {steps} one-step pairs for {report.n_states} state values (fewer "
                     f"than {STEPS_PER_STATE} per value): too few frames for a trustworthy fit")
    if not report.uniform_steps:
        notes.append("the frames are not equally spaced in time (frames were skipped); DMD "
                     "assumes equal steps, so frequencies and rates are distorted")
    growing = ~report.is_offset & (report.growth_rates > 0) & (np.abs(report.eigenvalues) > 1
                                                                + 1e-3)
    if np.any(growing):
        notes.append("some eigenvalues grow: a linear model predicts unbounded growth, which "
                     "usually means a transient or a drift rather than an instability")
    if not report.rate_known:
        notes.append("the frame rate is unknown: frequencies are in cycles per frame and "
                     "growth rates per frame (give --frame-rate HZ)")
    return notes
