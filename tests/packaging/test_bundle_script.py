"""packaging/build_bundle.py without building (PyInstaller is in the ``bundle`` extra, not in
``test``; the script itself was run by hand, see DEVELOPERS.md): its checks fail with a
one-line reason, and the size it prints counts the bundle's files."""

from __future__ import annotations

import importlib.util
import subprocess
import sys
from pathlib import Path

SCRIPT = Path(__file__).resolve().parents[2] / "packaging" / "build_bundle.py"


def _module():
    spec = importlib.util.spec_from_file_location("build_bundle", SCRIPT)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_checking_a_missing_bundle_fails_with_a_reason(tmp_path):
    done = subprocess.run([sys.executable, str(SCRIPT), "--check-only", "--dist",
                           str(tmp_path)], capture_output=True, text=True, timeout=120)
    assert done.returncode == 1
    assert done.stderr.strip() == (f"build_bundle: no modescope executable in "
                                   f"{tmp_path / 'modescope'}")
    assert "Traceback" not in done.stdout + done.stderr


def test_folder_size_counts_regular_files_once(tmp_path):
    bundle = _module()
    (tmp_path / "lib").mkdir()
    (tmp_path / "lib" / "a.so").write_bytes(b"x" * 1000)
    (tmp_path / "b.txt").write_bytes(b"y" * 24)
    (tmp_path / "link").symlink_to(tmp_path / "lib" / "a.so")
    assert bundle.folder_size(tmp_path) == 1024


def test_the_headless_environment_keeps_the_user_store_out(tmp_path):
    env = _module()._headless_env(tmp_path)
    assert env["QT_QPA_PLATFORM"] == "offscreen"
    assert env["HOME"] == str(tmp_path)
    assert env["XDG_DATA_HOME"] == str(tmp_path / "data")
    assert env["XDG_CONFIG_HOME"] == str(tmp_path / "config")
    assert "PYTHONPATH" not in env
