"""Tests of modescope.core.output.atomic, the one writer of output files."""

import csv
import errno
import ast
import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from export_testdata import listing
from modescope.core.output import atomic
from modescope.core.output.atomic import DestinationError, atomic_write_bytes, atomic_writer

posix_only = pytest.mark.skipif(os.name != "posix", reason="file modes and umask are POSIX")


def current_umask() -> int:
    """Read the process umask without changing it (os.umask would set it, for every thread)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except OSError:
        pass
    # a child shell inherits the umask and prints it in octal
    out = subprocess.run(["sh", "-c", "umask"], capture_output=True, text=True, check=True)
    return int(out.stdout.strip(), 8)


def test_atomic_write_bytes(tmp_path):
    p = tmp_path / "a.bin"
    atomic_write_bytes(p, b"one")
    assert p.read_bytes() == b"one"
    with pytest.raises(DestinationError, match="already exists") as info:
        atomic_write_bytes(p, b"two")
    assert info.value.path == p and p.read_bytes() == b"one"
    atomic_write_bytes(p, b"two", overwrite=True)
    assert p.read_bytes() == b"two"
    with pytest.raises(DestinationError, match="does not exist"):
        atomic_write_bytes(tmp_path / "no" / "b.bin", b"x")
    with pytest.raises(TypeError, match="data"):
        atomic_write_bytes(tmp_path / "c.bin", "text")
    assert listing(tmp_path) == ["a.bin"]


def test_atomic_writer_removes_temp_on_error(tmp_path):
    p = tmp_path / "t.csv"
    with pytest.raises(RuntimeError):
        with atomic_writer(p, "w", newline="") as f:
            f.write("partial")
            raise RuntimeError("boom")
    assert listing(tmp_path) == []
    with atomic_writer(p, "w", newline="") as f:
        csv.writer(f).writerow(["a", 1.5])
    assert p.read_bytes() == b"a,1.5\r\n"
    if os.name == "posix":
        mask = current_umask()
        assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~mask     # umask honoured


def test_destination_error_messages(tmp_path):
    p = tmp_path / "f.png"
    full = atomic.destination_error(p, OSError(errno.ENOSPC, "No space left on device"))
    assert "full" in str(full) and str(p) in str(full)
    ro = atomic.destination_error(p, OSError(errno.EROFS, "Read-only file system"))
    assert "read-only" in str(ro) and str(tmp_path) in str(ro)
    assert isinstance(full, ValueError)


@posix_only
@pytest.mark.parametrize("mask", [0o022, 0o077, 0o002])
def test_written_file_mode_follows_the_umask(tmp_path, mask):
    # the umask is set in a child process, so this process (and its threads) keeps its own
    code = ("import os, sys; os.umask(int(sys.argv[2], 8)); "
            "from modescope.core.output.atomic import atomic_write_bytes; "
            "atomic_write_bytes(sys.argv[1], b'x')")
    target = tmp_path / f"m{mask:o}.bin"
    subprocess.run([sys.executable, "-c", code, str(target), f"{mask:o}"], check=True)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~mask


@posix_only
def test_model_file_mode_follows_the_umask(tmp_path):
    from export_testdata import make_data, make_decomposition
    from modescope.core.output.model_file import save_model
    X = make_data()
    path = save_model(tmp_path / "m.npz", make_decomposition(X, (12, 16, 1)))
    assert stat.S_IMODE(path.stat().st_mode) == 0o666 & ~current_umask()
    assert listing(tmp_path) == ["m.npz"]                         # no temporary file left


def test_current_umask_reads_without_changing(tmp_path):
    before = current_umask()
    assert current_umask() == before and 0 <= before <= 0o777
    if os.name == "posix":
        # a plain new file gets 0o666 & ~umask from the kernel: the same reading
        p = tmp_path / "plain"
        p.write_bytes(b"")
        assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~before


def _package_sources():
    import modescope.app
    import modescope.core
    for package in (modescope.core, modescope.app):
        for folder in package.__path__:
            for path in sorted(Path(folder).rglob("*.py")):
                yield f"{package.__name__}:{path.relative_to(folder).as_posix()}", path


def _renames_in(path: Path) -> list[int]:
    """Line numbers where ``path`` uses os.replace / os.rename or imports them from os."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    lines = []
    for node in ast.walk(tree):
        if (isinstance(node, ast.Attribute) and node.attr in ("replace", "rename")
                and isinstance(node.value, ast.Name) and node.value.id == "os"):
            lines.append(node.lineno)
        elif isinstance(node, ast.ImportFrom) and node.module == "os" and any(
                a.name in ("replace", "rename") for a in node.names):
            lines.append(node.lineno)
    return lines


def test_only_the_atomic_module_renames_files():
    users = {}
    for name, path in _package_sources():
        found = _renames_in(path)
        if found:
            users[name] = found
    assert list(users) == ["modescope.core:output/atomic.py"], users
    assert len(users["modescope.core:output/atomic.py"]) == 1
