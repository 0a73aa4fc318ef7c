"""Command line: analyze and info, exit codes and messages."""

import shlex

import numpy as np
import pytest
from PIL import Image

from modescope.app.cli.main import main
from modescope.core.output.model_file import load_model


@pytest.fixture()
def folder(tmp_path):
    rng = np.random.default_rng(0)
    base = rng.random((3, 10, 12))
    f = tmp_path / "frames"
    f.mkdir()
    for i in range(30):
        v = 0.3 + 0.2 * np.tensordot(rng.normal(size=3), base, 1) / 3
        Image.fromarray(np.clip(v * 255, 0, 255).astype(np.uint8)).save(f / f"frame_{i}.png")
    Image.fromarray(np.zeros((5, 5), np.uint8)).save(f / "odd_size.png")
    return f


def test_analyze_writes_model_and_reports_problems(folder, tmp_path, capsys):
    out = tmp_path / "m.npz"
    code = main(["analyze", str(folder), "-o", str(out), "--rank", "4", "--quiet"])
    err = capsys.readouterr().err
    assert code == 0
    d = load_model(out)
    assert d.n_images == 30 and d.rank == 4 and d.exact
    assert "odd_size.png" in err and "1 file(s) skipped" in err
    assert "analysed 30 images of 10x12 (gray)" in err
    # with --resize-mismatched the odd one is included
    assert main(["analyze", str(folder), "-o", str(out), "--rank", "4", "--quiet",
                 "--resize-mismatched"]) == 1          # the model exists: --overwrite needed
    assert "pass --overwrite to replace it" in capsys.readouterr().err
    assert main(["analyze", str(folder), "-o", str(out), "--rank", "4", "--quiet",
                 "--resize-mismatched", "--overwrite"]) == 0
    assert load_model(out).n_images == 31


def test_progress_is_shown_on_stderr(folder, tmp_path, capsys):
    assert main(["analyze", str(folder), "-o", str(tmp_path / "p.npz"), "--rank", "2"]) == 0
    err = capsys.readouterr().err
    assert "learn: 30/30 images (100%)" in err and "score: 30/30 images (100%)" in err


def test_info_lists_energy_per_rank(folder, tmp_path, capsys):
    out = tmp_path / "m.npz"
    main(["analyze", str(folder), "-o", str(out), "--rank", "5", "--quiet"])
    capsys.readouterr()
    assert main(["info", str(out)]) == 0
    text = capsys.readouterr().out
    d = load_model(out)
    assert "images:       30 images" in text and "10 rows x 12 cols, gray" in text
    cum = d.cumulative_energy()
    lines = text.splitlines()
    top = lines.index("  rank  singular value  certified error  share %  cumulative %")
    for r in range(5):
        # every number right-aligned under its header: the cumulative share ends the line
        assert lines[top + 1 + r].endswith(f"  {100 * cum[r]:12.2f}")
        assert len(lines[top + 1 + r]) == len(lines[top])


def test_exit_codes(tmp_path, capsys):
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["analyze", str(empty), "-o", str(tmp_path / "x.npz")]) == 1
    assert "nothing usable" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["analyze", str(empty)])           # missing -o
    assert exc.value.code == 2
    with pytest.raises(SystemExit) as exc:
        main(["analyze", str(empty), "-o", "x.npz", "--rank", "zero"])
    assert exc.value.code == 2
    assert main(["info", str(tmp_path / "missing.npz")]) == 1
    assert "missing.npz: no such file" in capsys.readouterr().err
    assert main(["analyze", str(empty), "-o", str(empty)]) == 2
    assert main([str(tmp_path / "nope")]) == 2


def test_too_large_downscale_and_memory_errors_are_messages(folder, tmp_path, capsys,
                                                            monkeypatch):
    out = tmp_path / "d.npz"
    # 10x12 frames cannot be downscaled by 20: a message naming the limit, no traceback
    assert main(["analyze", str(folder), "-o", str(out), "--downscale", "20", "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "downscale 20 is too large for the reference size 10x12" in err
    assert "use at most 10" in err and not out.exists()
    from modescope.app.cli import analyze as analyze_verb

    def no_memory(*args, **kwargs):
        raise MemoryError
    monkeypatch.setattr(analyze_verb, "analyze", no_memory)
    assert main(["analyze", str(folder), "-o", str(out), "--quiet"]) == 1
    assert "not enough memory" in capsys.readouterr().err


def test_single_image_gives_a_mean_only_model(tmp_path, capsys):
    # one image (or identical ones): centred, the data is zero, so there is no basis image;
    # the model holds the mean and the commands say so instead of failing
    f = tmp_path / "one"
    f.mkdir()
    Image.fromarray(np.arange(120, dtype=np.uint8).reshape(10, 12)).save(f / "only.png")
    out = tmp_path / "one.npz"
    assert main(["analyze", str(f), "-o", str(out), "--quiet"]) == 0
    assert "no basis images: the images do not vary" in capsys.readouterr().err
    d = load_model(out)
    assert d.rank == 0 and d.n_images == 1 and d.total_energy == 0
    np.testing.assert_allclose(d.mean, np.arange(120) / 255, atol=1e-6)
    assert main(["info", str(out)]) == 0
    assert "basis images: none" in capsys.readouterr().out


def test_info_into_a_closed_pipe_stops_quietly(folder, tmp_path, monkeypatch, capsys):
    import io
    import sys
    out = tmp_path / "m.npz"
    assert main(["analyze", str(folder), "-o", str(out), "--rank", "4", "--quiet"]) == 0
    capsys.readouterr()

    class ClosedPipe(io.TextIOBase):
        # what `modescope info m.npz | head -1` meets once head has gone
        def __init__(self, fd):
            self.fd = fd

        def write(self, text):
            raise BrokenPipeError(32, "Broken pipe")

        def fileno(self):
            return self.fd

    with open(tmp_path / "stdout.txt", "wb") as target:
        monkeypatch.setattr(sys, "stdout", ClosedPipe(target.fileno()))
        code = main(["info", str(out)])
    monkeypatch.undo()
    assert code == 1                          # stopped quietly: an exit code, no traceback
    assert "Traceback" not in capsys.readouterr().err


def test_ctrl_c_writes_the_partial_analysis_and_update_completes_it(folder, tmp_path,
                                                                      monkeypatch, capsys):
    import signal
    from modescope.core.engine.streaming import StreamingSVD
    out = tmp_path / "partial.npz"
    real_update = StreamingSVD.update
    calls = []

    def update_then_ctrl_c(self, block):
        real_update(self, block)
        calls.append(block.shape[1])
        if len(calls) == 2:
            signal.raise_signal(signal.SIGINT)     # the user presses Ctrl-C once
    monkeypatch.setattr(StreamingSVD, "update", update_then_ctrl_c)
    code = main(["analyze", str(folder), "-o", str(out), "--rank", "3", "--block-size", "5",
                 "--quiet"])
    err = capsys.readouterr().err
    assert code == 130
    assert "stopping after the current block" in err
    assert "wrote the streaming result of 10 images" in err
    hint = next(line.strip() for line in err.splitlines()
                if line.strip().startswith("modescope update"))
    partial = load_model(out)
    assert partial.n_images == 10 and not partial.exact
    assert partial.metadata["stage"] == "cancelled"
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler   # handler restored
    monkeypatch.undo()
    # resuming, typed as printed: update adds the 20 images not yet in the model and runs the
    # exact pass
    words = shlex.split(hint)
    assert words[:2] == ["modescope", "update"]
    assert main(words[1:]) == 0
    full = load_model(out)
    assert full.n_images == 30 and full.exact


def test_info_says_more_than_k_and_what_rank_gavish_donoho_needs(tmp_path, capsys):
    from modescope.core.decomposition import Decomposition, fix_signs
    from modescope.core.output.model_file import save_model
    from modescope.core.review.rank import gavish_donoho
    rng = np.random.default_rng(7)
    x = rng.normal(size=(48, 80)) * np.linspace(3, 1, 48)[:, None]   # 6x8 pixels, 80 images
    c = x - x.mean(axis=1, keepdims=True)
    u, s, vt = np.linalg.svd(c, full_matrices=False)                 # LAPACK reference

    def model(k):
        basis, weights = fix_signs(u[:, :k], s[:k, None] * vt[:k])
        return Decomposition(mean=x.mean(axis=1).astype(np.float32),
                             basis=basis.astype(np.float32), singular_values=s[:k].copy(),
                             weights=weights, total_energy=float(np.sum(c ** 2)),
                             image_shape=(6, 8, 1),
                             residual=np.sum((c - basis @ weights) ** 2, axis=0), exact=True)

    cum = np.cumsum(s ** 2) / np.sum(s ** 2)
    assert cum[9] < 0.9                        # 10 modes hold far less than 90 %
    cum10 = float(cum[9])
    save_model(tmp_path / "r10.npz", model(10))
    assert main(["info", str(tmp_path / "r10.npz")]) == 0
    out = capsys.readouterr().out
    assert ("suggested rank: 10, all 10 modes of the model: together they capture "
            f"{100 * cum10:.1f} % of the energy, less than 95 % (the default of the desktop "
            "program and of every command's --rank)") in out
    assert ("other rules:    more than 10 for 90 % of the energy; Gavish-Donoho: not applicable "
            "(the median singular value is unknown: the model keeps 10 of the 48 modes the data "
            "can have, and the median is mode 24; analyse with rank 25 or more (or 48, every "
            "mode))") in out
    # a model holding every mode: the real energy rank and the threshold's rank
    full = model(48)
    save_model(tmp_path / "full.npz", full)
    assert main(["info", str(tmp_path / "full.npz")]) == 0
    out = capsys.readouterr().out
    expect = int(np.searchsorted(cum, 0.9) + 1)
    assert expect > 10
    assert (f"other rules:    {expect} for 90 % of the energy; {gavish_donoho(full).rank} by the "
            "Gavish-Donoho hard threshold") in out
    default = int(np.searchsorted(cum, 0.95) + 1)      # the smallest rank reaching 95% (LAPACK)
    assert default > expect
    assert (f"suggested rank: {default}, the smallest rank capturing 95 % of the energy "
            f"({default} modes capture {100 * cum[default - 1]:.1f} %)") in out
