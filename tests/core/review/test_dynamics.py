"""Exact DMD of the weights (core.review.dynamics)."""

from __future__ import annotations

import numpy as np
import pytest

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.review.dynamics import (RESIDUAL_LIMIT, DynamicsReport, caution, dmd,
                                            dynamics_of)

FS = 20.0
SIGMA = -0.3                 # decay rate, 1/s
FREQ = 1.5                   # Hz


def damped(n=200, noise=1e-3, seed=1, centred=False):
    """Weights (2, n) of a damped oscillation exp(SIGMA t) (cos 2 pi f t, sin 2 pi f t)."""
    t = np.arange(n) / FS
    w = np.exp(SIGMA * t) * np.vstack([np.cos(2 * np.pi * FREQ * t),
                                       np.sin(2 * np.pi * FREQ * t)])
    if centred:
        w = w - w.mean(axis=1, keepdims=True)
    return w + np.random.default_rng(seed).normal(0.0, noise, w.shape)


@pytest.mark.parametrize("centred, offset", [(False, False), (False, True), (True, True)])
def test_damped_oscillation_rate_and_frequency_within_one_percent(centred, offset):
    # known answer: x(t) = exp((sigma + i w) t) has the continuous eigenvalue sigma +/- i w,
    # i.e. lambda = exp((sigma +/- 2 pi i f) / fs) per frame (Schmid 2010; Tu et al. 2014)
    r = dmd(damped(centred=centred), frame_rate=FS, offset=offset)
    osc = r.oscillations
    assert len(osc) == 1
    j = osc[0]
    assert r.growth_rates[j] == pytest.approx(SIGMA, rel=0.01)
    assert r.frequencies[j] == pytest.approx(FREQ, rel=0.01)
    lam = np.exp((SIGMA + 2j * np.pi * FREQ) / FS)
    assert abs(r.eigenvalues[j] - lam) < 1e-3
    assert r.unit == "Hz" and r.rate_unit == "1/s"
    assert r.residual < 0.02
    assert r.n_states == 2 + offset and int(r.is_offset.sum()) == int(offset)
    # amplitude: the first frame (1, 0) = 0.5 (1, -i) + 0.5 (1, i), each mode of unit norm
    if not centred:
        assert r.amplitudes[j] == pytest.approx(np.sqrt(0.5), rel=0.01)
    assert caution(r) == []


def test_eigenvalues_match_the_least_squares_operator():
    # reference: numpy LAPACK, A = Y X^+ (full-rank X: exact DMD's eigenvalues are A's)
    rng = np.random.default_rng(4)
    a = np.array([[0.9, -0.3, 0.0], [0.3, 0.9, 0.1], [0.0, -0.05, 0.7]])
    x = np.empty((3, 60))
    x[:, 0] = rng.normal(size=3)
    for t in range(59):
        x[:, t + 1] = a @ x[:, t] + rng.normal(0, 1e-2, 3)
    r = dmd(x, offset=False)
    ref = np.linalg.eigvals(x[:, 1:] @ np.linalg.pinv(x[:, :-1]))
    np.testing.assert_allclose(np.sort_complex(r.eigenvalues), np.sort_complex(ref),
                               atol=1e-10)
    assert np.allclose(np.sort_complex(r.eigenvalues), np.sort_complex(np.linalg.eigvals(a)),
                       atol=0.05)
    # exact DMD modes are eigenvectors of the fitted operator: A phi = lambda phi
    fit = x[:, 1:] @ np.linalg.pinv(x[:, :-1])
    np.testing.assert_allclose(fit @ r.modes, r.modes * r.eigenvalues[None, :], atol=1e-9)
    assert r.unit == "cycles per frame" and r.rate_unit == "1/frame"


def test_noise_gets_a_caution_on_the_residual():
    w = np.random.default_rng(0).normal(size=(3, 100))
    r = dmd(w, frame_rate=10.0)
    assert r.residual > RESIDUAL_LIMIT
    assert any("unexplained" in note for note in caution(r))


def test_too_few_frames_skipped_frames_and_unknown_rate_are_cautioned():
    short = dmd(damped(n=10), offset=True)
    notes = " | ".join(caution(short))
    assert "only 9 one-step pairs for 3 state values" in notes
    assert "frame rate is unknown" in notes
    times = np.arange(200.0)
    times[100:] += 1                           # one frame skipped
    gap = dmd(damped(), frame_rate=FS, times=times)
    assert not gap.uniform_steps
    assert any("not equally spaced" in note for note in caution(gap))


def test_growth_is_cautioned():
    t = np.arange(80) / FS
    w = np.exp(0.2 * t) * np.vstack([np.cos(2 * np.pi * t), np.sin(2 * np.pi * t)])
    r = dmd(w, frame_rate=FS, offset=False)
    assert r.growth_rates[r.oscillations[0]] == pytest.approx(0.2, rel=1e-6)
    assert any("grow" in note for note in caution(r))


def test_dynamics_of_a_decomposition_uses_rank_rate_and_frame_numbers():
    w = damped(n=120, centred=True)
    k, n = 3, w.shape[1]
    weights = np.vstack([w, 1e-3 * np.random.default_rng(2).normal(size=(1, n))])
    basis, weights = fix_signs(np.eye(8)[:, :k], weights)
    d = Decomposition(mean=np.zeros(8, np.float32), basis=basis.astype(np.float32),
                      singular_values=np.linalg.norm(weights, axis=1), weights=weights,
                      total_energy=float(np.sum(weights ** 2)), image_shape=(2, 4, 1),
                      paths=("stack.npy",) * n, pages=np.arange(n) * 2,
                      metadata={"frame_rate": FS})
    r = dynamics_of(d, rank=2)
    j = r.oscillations[0]
    assert r.n_states == 3 and r.frame_rate == FS and r.uniform_steps
    assert r.growth_rates[j] == pytest.approx(SIGMA, rel=0.01)
    pages = np.arange(n)
    pages[60:] += 5
    skipped = dynamics_of(d.replace(pages=pages), rank=2, frame_rate=2 * FS)
    assert not skipped.uniform_steps
    assert skipped.frequencies[skipped.oscillations[0]] == pytest.approx(2 * FREQ, rel=0.01)


@pytest.mark.parametrize("weights, kwargs, err, match", [
    ([[1.0, 2.0, 3.0]], {}, TypeError, "weights must be a numpy array"),
    (np.ones(5), {}, ValueError, r"shape \(modes, frames\)"),
    (np.ones((1, 2)), {}, ValueError, "at least 1 mode and 3 frames"),
    (np.full((1, 5), np.inf), {}, ValueError, "finite"),
    (np.zeros((2, 5)), {"offset": False}, ValueError, "all zero"),
    (np.ones((1, 5)), {"frame_rate": -1.0}, ValueError, "frame_rate must be >"),
    (np.ones((1, 5)), {"offset": 1}, TypeError, "offset must be True or False"),
    (np.ones((1, 5)), {"times": [0, 1, 2]}, ValueError, r"times must have shape \(5,\)"),
    (np.ones((1, 5)), {"times": [0, 1, 1, 2, 3]}, ValueError, "strictly increasing"),
])
def test_bad_input_is_named(weights, kwargs, err, match):
    with pytest.raises(err, match=match):
        dmd(weights, **kwargs)


def test_bad_report_type_is_named():
    with pytest.raises(TypeError, match="report must be a DynamicsReport"):
        caution({"residual": 0.0})
    assert isinstance(dmd(damped(n=50)), DynamicsReport)
