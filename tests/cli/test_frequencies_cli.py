"""``modescope frequencies``: the table, the pairs, the DMD lines and the CSV."""

from __future__ import annotations

import csv

import numpy as np
import pytest

from modescope.app.cli.main import main
from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.output.model_file import save_model

FS = 25.0


def wave_model(path, n=200, rate=FS, freqs=(2.0, 5.0)):
    """Save an exact model (numpy.linalg.svd, LAPACK) of two waves travelling along the columns
    (frequencies on bins: 200 frames at 25 Hz, one bin 0.125 Hz) plus a little noise."""
    t = np.arange(n) / FS
    x = np.arange(48) / 48.0
    field = sum(a * np.cos(2 * np.pi * (k * x[None, :] - f * t[:, None]))
                for f, k, a in zip(freqs, (2, 5), (1.0, 0.5)))
    frames = 0.5 + 0.2 * np.repeat(field[:, None, :], 8, axis=1)
    frames += np.random.default_rng(0).normal(0.0, 0.02, frames.shape)
    data = frames.reshape(n, -1).T
    mean = data.mean(axis=1)
    c = data - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    basis, weights = fix_signs(u[:, :6], s[:6, None] * vt[:6])
    d = Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                      singular_values=s[:6], weights=weights, total_energy=float(np.sum(c ** 2)),
                      image_shape=(8, 48, 1), exact=True,
                      metadata={} if rate is None else {"frame_rate": rate})
    save_model(path, d)
    return d


def test_table_pairs_dynamics_and_csv(tmp_path, capsys):
    model = tmp_path / "waves.npz"
    d = wave_model(model)
    out_csv = tmp_path / "freq.csv"
    assert main(["frequencies", str(model), "--rank", "6", "--csv", str(out_csv)]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[1] == "Frame rate: 25 Hz (stored in the model)"
    assert lines[2] == "Rank 6 of 6: given by --rank"
    assert "one bin = 0.125 Hz" in lines[3]
    assert lines[4].split() == ["mode", "singular", "value", "dominant", "frequency", "(Hz)",
                                "power", "share", "(%)", "pair"]
    table = [line.split() for line in lines[5:11]]
    assert [r[0] for r in table] == ["1", "2", "3", "4", "5", "6"]
    assert [r[2] for r in table[:4]] == ["2", "2", "5", "5"]      # the waves' frequencies
    assert [r[4] for r in table[:4]] == ["2", "1", "4", "3"]      # the pairs
    assert all(len(r) == 4 for r in table[4:])                     # noise: no pair
    assert "  modes 1 and 2: 2 Hz, phase lag" in out
    assert "  modes 3 and 4: 5 Hz, phase lag" in out
    dmd_rows = out.split("amplitude\n")[1].splitlines()
    freqs = [float(r.split()[0]) for r in dmd_rows[:2]]
    rates = [float(r.split()[1]) for r in dmd_rows[:2]]
    assert freqs == pytest.approx([2.0, 5.0], rel=0.01)         # steady waves: no growth
    assert np.all(np.abs(rates) < 0.05)
    assert f"CSV written: {out_csv}" in out
    with open(out_csv, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == ["mode", "singular_value", "dominant_frequency", "power_share",
                             "pair"]
    assert [r["pair"] for r in rows] == ["2", "1", "4", "3", "", ""]
    assert [float(r["dominant_frequency"]) for r in rows[:4]] == [2.0, 2.0, 5.0, 5.0]
    np.testing.assert_array_equal([float(r["singular_value"]) for r in rows],
                                  d.singular_values)
    assert all(0.9 < float(r["power_share"]) <= 1.0 for r in rows[:4])


def test_unknown_rate_says_cycles_per_frame_and_frame_rate_option_overrides(tmp_path, capsys):
    model = tmp_path / "norate.npz"
    wave_model(model, rate=None)
    assert main(["frequencies", str(model), "--rank", "2"]) == 0
    out = capsys.readouterr().out
    assert "Frame rate: unknown" in out and "cycles per frame" in out
    assert out.splitlines()[5].split()[2] == "0.08"               # 2 Hz / 25 frames per second
    assert "growth rate (1/frame)" in out and "frame rate is unknown" in out
    assert main(["frequencies", str(model), "--rank", "2", "--frame-rate", "50"]) == 0
    out = capsys.readouterr().out
    assert "Frame rate: 50 Hz (given by --frame-rate)" in out
    assert out.splitlines()[5].split()[2] == "4"


def test_bad_input_gets_one_line_and_no_traceback(tmp_path, capsys):
    model = tmp_path / "w.npz"
    wave_model(model, n=40)
    assert main(["frequencies", str(tmp_path / "missing.npz")]) == 1
    err = capsys.readouterr().err
    assert "modescope frequencies: error:" in err and "missing.npz" in err
    assert "Traceback" not in err
    assert main(["frequencies", str(model), "--rank", "7"]) == 2
    assert "--rank must be at most 6" in capsys.readouterr().err
    with pytest.raises(SystemExit) as info:
        main(["frequencies", str(model), "--frame-rate", "-3"])
    assert info.value.code == 2
    assert "above 0, got -3" in capsys.readouterr().err
    existing = tmp_path / "x.csv"
    existing.write_text("keep me")
    assert main(["frequencies", str(model), "--csv", str(existing)]) == 1
    assert "already exists" in capsys.readouterr().err
    assert existing.read_text() == "keep me"
    assert main(["frequencies", str(model), "--csv", str(model), "--overwrite"]) == 1
    assert "model file" in capsys.readouterr().err
    (tmp_path / "junk.npz").write_bytes(b"not a zip")
    assert main(["frequencies", str(tmp_path / "junk.npz")]) == 1
    assert "junk.npz" in capsys.readouterr().err


def test_too_few_frames_named(tmp_path, capsys):
    model = tmp_path / "three.npz"
    rng = np.random.default_rng(1)
    c = rng.normal(size=(12, 3))
    c -= c.mean(axis=1, keepdims=True)
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    d = Decomposition(mean=np.zeros(12, np.float32), basis=u[:, :2].astype(np.float32),
                      singular_values=s[:2], weights=s[:2, None] * vt[:2],
                      total_energy=float(np.sum(c ** 2)), image_shape=(3, 4, 1))
    save_model(model, d)
    assert main(["frequencies", str(model)]) == 1
    assert "needs at least 4 frames, the model has 3" in capsys.readouterr().err


def test_damped_travelling_wave_through_analyze_of_a_stack(tmp_path, capsys):
    # known answer: frames exp(-0.2 t) cos(2 pi (3 x - 2.5 t)) give one pair at 2.5 Hz whose
    # DMD eigenvalue is -0.2 +/- 2 pi i 2.5 per second (Schmid 2010; Tu et al. 2014)
    fs, n = 30.0, 300
    t = np.arange(n) / fs
    x = np.arange(64) / 64.0
    wave = np.exp(-0.2 * t)[:, None] * np.cos(2 * np.pi * (3 * x[None, :] - 2.5 * t[:, None]))
    stack = tmp_path / "damped.npy"
    np.save(stack, (0.5 + 0.3 * np.repeat(wave[:, None, :], 16, axis=1)).astype(np.float32))
    model = tmp_path / "damped.npz"
    assert main(["analyze", str(stack), "--rank", "4", "--frame-rate", str(fs),
                 "-o", str(model)]) == 0
    capsys.readouterr()
    assert main(["frequencies", str(model), "--rank", "2"]) == 0
    out = capsys.readouterr().out
    assert "Frame rate: 30 Hz (stored in the model)" in out
    assert "  modes 1 and 2: 2.5 Hz, phase lag" in out
    row = out.split("amplitude\n")[1].splitlines()[0].split()
    assert float(row[0]) == pytest.approx(2.5, rel=0.01)
    assert float(row[1]) == pytest.approx(-0.2, rel=0.01)
    assert "One-step fit: less than 0.01 %" in out
