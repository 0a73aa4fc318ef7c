"""Interrupted commands: Ctrl-C (SIGINT) and SIGTERM at start-up, during the work and while a
file is written end with exit code 130 and no traceback; temporary files of a killed process are
removed by the next run that writes into their folder. Signals are sent to real subprocesses
with a bounded wait; the sources are hashed before and after."""

from __future__ import annotations

import hashlib
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from modescope.app.cli.main import main
from modescope.core.output import atomic
from modescope.core.output.model_file import load_model

WAIT = 120          # seconds: a bound, never reached when the program behaves

_SLOW_UPDATE = """
import sys, time
from modescope.core.engine.streaming import StreamingSVD
real = StreamingSVD.update
def slow(self, block):
    real(self, block)
    print("ready", file=sys.stderr, flush=True)
    time.sleep(0.3)
StreamingSVD.update = slow
from modescope.app.cli.main import main
sys.exit(main())
"""

_PLAIN = """
import sys
from modescope.app.cli.main import main
print("ready", file=sys.stderr, flush=True)
sys.exit(main())
"""


def _hashes(folder) -> dict:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(Path(folder).iterdir())}


@pytest.fixture()
def frames(tmp_path):
    rng = np.random.default_rng(5)
    folder = tmp_path / "frames"
    folder.mkdir()
    for i in range(40):
        Image.fromarray(rng.integers(0, 255, (12, 10), dtype=np.uint8)).save(
            folder / f"f{i:02d}.png")
    return folder


def _start(script: str, args) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-c", script, *map(str, args)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _signal_when_ready(proc: subprocess.Popen, signals, gap: float = 0.05):
    """Wait for the "ready" line, send ``signals`` one after another, return (code, stderr)."""
    seen = []
    deadline = time.monotonic() + WAIT
    while time.monotonic() < deadline:
        line = proc.stderr.readline()
        if not line:
            break
        seen.append(line)
        if line.strip() == "ready":
            break
    assert seen and seen[-1].strip() == "ready", "".join(seen)
    for number, sig in enumerate(signals):
        if number:
            time.sleep(gap)
        proc.send_signal(sig)
    try:
        _, err = proc.communicate(timeout=WAIT)
    except subprocess.TimeoutExpired:          # pragma: no cover - a hang is a failure
        proc.kill()
        proc.communicate()
        raise
    return proc.returncode, "".join(seen) + err


def test_ctrl_c_during_start_up_exits_130_quietly(frames, tmp_path):
    before = _hashes(frames)
    out = tmp_path / "m.npz"
    code, err = _signal_when_ready(_start(_PLAIN, ["analyze", frames, "-o", out, "--quiet"]),
                                   [signal.SIGINT])
    assert code == 130, err
    assert "Traceback" not in err and "interrupted" in err
    assert _hashes(frames) == before


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_one_signal_during_the_analysis_keeps_the_work_done(frames, tmp_path, sig):
    before = _hashes(frames)
    out = tmp_path / "m.npz"
    proc = _start(_SLOW_UPDATE, ["analyze", frames, "-o", out, "--quiet", "--block-size", "4",
                                 "--rank", "2"])
    code, err = _signal_when_ready(proc, [sig])
    assert code == 130, err
    assert "Traceback" not in err
    assert "stopping after the current block" in err
    partial = load_model(out)
    assert 0 < partial.n_images < 40 and not partial.exact
    assert _hashes(frames) == before
    assert not [n for n in os.listdir(tmp_path) if atomic.is_temp_name(n)]


def test_a_second_signal_stops_at_once_and_writes_nothing(frames, tmp_path):
    before = _hashes(frames)
    out = tmp_path / "m.npz"
    proc = _start(_SLOW_UPDATE, ["analyze", frames, "-o", out, "--quiet", "--block-size", "4"])
    code, err = _signal_when_ready(proc, [signal.SIGINT, signal.SIGTERM])
    assert code == 130, err
    assert "Traceback" not in err and "nothing written" in err
    assert not out.exists()
    assert _hashes(frames) == before
    assert sorted(os.listdir(tmp_path)) == ["frames"]


def test_ctrl_c_while_the_model_file_is_written(frames, tmp_path, monkeypatch, capsys):
    before = _hashes(frames)
    out = tmp_path / "m.npz"
    real = np.savez

    def savez_then_ctrl_c(fh, **arrays):
        real(fh, **arrays)                      # half of the work: bytes in the temporary file
        assert [n for n in os.listdir(tmp_path) if atomic.is_temp_name(n)]
        signal.raise_signal(signal.SIGINT)
    monkeypatch.setattr(np, "savez", savez_then_ctrl_c)
    code = main(["analyze", str(frames), "-o", str(out), "--quiet", "--rank", "2"])
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert code == 130 and "Traceback" not in err
    assert "modescope analyze: interrupted" in err
    assert sorted(os.listdir(tmp_path)) == ["frames"]       # no model, no temporary file
    assert _hashes(frames) == before


def test_export_exits_130_when_interrupted(frames, tmp_path, monkeypatch, capsys):
    model = tmp_path / "m.npz"
    assert main(["analyze", str(frames), "-o", str(model), "--rank", "3", "--quiet"]) == 0
    before = _hashes(frames)
    from modescope.app.cli import export as export_cli

    class CtrlCAfterTwoFiles:
        def __init__(self, *args):
            pass

        def __call__(self, done, total):
            if done == 2:
                signal.raise_signal(signal.SIGINT)       # the user presses Ctrl-C once
    monkeypatch.setattr(export_cli, "CountProgress", CtrlCAfterTwoFiles)
    out = tmp_path / "exp"
    code = main(["export", str(model), "--rank", "2", "--out", str(out), "--what", "basis"])
    err = capsys.readouterr().err
    assert code == 130 and "Traceback" not in err
    assert "stopping after the current file" in err
    assert sorted(os.listdir(out)) == ["basis_001.png", "mean.png"]
    for name in os.listdir(out):                           # the files kept are complete
        with Image.open(out / name) as img:
            img.load()
    assert _hashes(frames) == before
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler


def test_the_resume_hint_completes_the_model_when_typed_as_printed(frames, tmp_path,
                                                                   monkeypatch, capsys):
    import shlex
    from modescope.core.engine.streaming import StreamingSVD
    real = StreamingSVD.update
    calls = []

    def update_then_ctrl_c(self, block):
        real(self, block)
        calls.append(1)
        if len(calls) == 3:
            signal.raise_signal(signal.SIGINT)
    monkeypatch.setattr(StreamingSVD, "update", update_then_ctrl_c)
    weird = tmp_path / "my frames"                # a name that needs quoting
    frames.rename(weird)
    before = _hashes(weird)
    out = tmp_path / "a model.npz"
    assert main(["analyze", str(weird), "-o", str(out), "--quiet", "--block-size", "5",
                 "--rank", "3", "--tolerance", "0.001"]) == 130
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert load_model(out).n_images == 15
    hint = [line.strip() for line in err.splitlines() if line.strip().startswith("modescope update ")]
    assert len(hint) == 1 and "--tolerance 0.001" in hint[0]
    words = shlex.split(hint[0])
    assert words[0] == "modescope"
    assert main(words[1:]) == 0
    full = load_model(out)
    assert full.n_images == 40 and full.exact
    assert _hashes(weird) == before


def test_the_resume_hint_also_finishes_a_model_stopped_during_its_passes(frames, tmp_path,
                                                                         monkeypatch, capsys):
    import shlex
    from modescope.core.engine import passes
    real = passes.refine

    def refine_stopped(*args, cancel=None, **kwargs):
        signal.raise_signal(signal.SIGINT)            # Ctrl-C as the passes begin
        return real(*args, cancel=cancel, **kwargs)
    monkeypatch.setattr(passes, "refine", refine_stopped)
    import modescope.core.engine.pipeline as pipeline
    monkeypatch.setattr(pipeline, "refine", refine_stopped)
    out = tmp_path / "m.npz"
    assert main(["analyze", str(frames), "-o", str(out), "--quiet", "--rank", "3"]) == 130
    monkeypatch.undo()
    err = capsys.readouterr().err
    partial = load_model(out)
    assert partial.n_images == 40 and not partial.exact
    hint = [line.strip() for line in err.splitlines() if line.strip().startswith("modescope update ")]
    assert len(hint) == 1
    assert main(shlex.split(hint[0])[1:]) == 0
    assert "analysing its images again" in capsys.readouterr().err
    full = load_model(out)
    assert full.n_images == 40 and full.exact


def test_a_killed_writer_leaves_a_temporary_file_the_next_run_removes(frames, tmp_path,
                                                                      capsys):
    folder = tmp_path / "models"
    folder.mkdir()
    script = ("import sys, time\n"
              "from modescope.core.output.atomic import atomic_writer\n"
              "with atomic_writer(sys.argv[1], 'wb') as f:\n"
              "    f.write(b'half'); f.flush()\n"
              "    print('ready', file=sys.stderr, flush=True)\n"
              "    time.sleep(60)\n")
    proc = _start(script, [folder / "m.npz"])
    assert proc.stderr.readline().strip() == "ready"
    proc.kill()                                       # no chance to clean up
    proc.communicate(timeout=WAIT)
    left = [n for n in os.listdir(folder) if atomic.is_temp_name(n)]
    assert len(left) == 1 and f"-{proc.pid}-" in left[0]
    live = atomic.temp_name(folder / "other.npz")     # this process is alive: kept
    live.write_bytes(b"being written")
    foreign = folder / ".notes.tmp"                   # not ours: kept
    foreign.write_bytes(b"someone else's")
    before = _hashes(frames)
    assert main(["analyze", str(frames), "-o", str(folder / "m.npz"), "--quiet",
                 "--rank", "2"]) == 0
    assert sorted(os.listdir(folder)) == sorted([".notes.tmp", live.name, "m.npz"])
    assert _hashes(frames) == before
