"""Any file name works in the terminal: names that are not valid UTF-8 and notes on files."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
from PIL import Image


@pytest.mark.skipif(sys.platform == "win32", reason="byte file names are a POSIX matter")
def test_a_name_that_is_not_utf8_reaches_the_terminal(tmp_path):
    folder = tmp_path / "frames"
    folder.mkdir()
    rng = np.random.default_rng(0)
    for i in range(6):
        Image.fromarray(rng.integers(0, 256, (8, 9), dtype=np.uint8)).save(folder / f"f{i}.png")
    odd = os.fsencode(folder) + b"/caf\xe9.png"              # Latin-1, not valid UTF-8
    Image.fromarray(rng.integers(0, 256, (5, 5), dtype=np.uint8)).save(odd)  # wrong size: named
    model = tmp_path / "m.npz"
    # a real process with a UTF-8 terminal encoding: printing the name must not fail
    env = dict(os.environ, PYTHONIOENCODING="utf-8")
    done = subprocess.run([sys.executable, "-m", "modescope.app.cli.main", "analyze",
                           str(folder), "-o", str(model), "--rank", "2", "--quiet"],
                          capture_output=True, env=env, timeout=120)
    err = done.stderr.decode("utf-8")
    assert done.returncode == 0, err
    assert "Traceback" not in err
    assert "caf\\udce9.png" in err or "caf\\xe9.png" in err   # escaped, never a crash
    assert model.exists()
    # standard output (strict by default, unlike standard error): `info` lists the skipped file
    done = subprocess.run([sys.executable, "-m", "modescope.app.cli.main", "info", str(model)],
                          capture_output=True, env=env, timeout=120)
    out, err = done.stdout.decode("utf-8"), done.stderr.decode("utf-8")
    assert done.returncode == 0, err
    assert "Traceback" not in err
    assert "caf\\udce9.png" in out
