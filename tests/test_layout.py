"""The project's layout rules: core imports no front end, no oversized source files."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _sources(folder: str):
    return sorted((ROOT / folder).rglob("*.py"))


def test_core_never_imports_a_front_end_or_qt():
    offending = []
    for path in _sources("core"):
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            text = line.strip()
            if text.startswith(("import ", "from ")) and (
                    "modescope.app" in text or "PySide6" in text or "pyqtgraph" in text):
                offending.append(f"{path.relative_to(ROOT)}:{number}: {text}")
    assert offending == []


def test_importing_all_of_core_loads_no_front_end():
    # import every core module in a fresh interpreter; neither Qt nor modescope.app may load
    code = ("import importlib, pkgutil, sys, modescope.core as c\n"
            "for m in pkgutil.walk_packages(c.__path__, 'modescope.core.'):\n"
            "    importlib.import_module(m.name)\n"
            "bad = sorted(n for n in sys.modules if n.startswith(('modescope.app', 'PySide6',"
            " 'pyqtgraph')))\n"
            "print(bad)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          check=True)
    assert done.stdout.strip() == "[]"


def test_no_command_line_module_in_core():
    names = [p.name for p in _sources("core")]
    assert not [n for n in names if n.startswith("cli") or "argparse" in n]
    for path in _sources("core"):
        assert "import argparse" not in path.read_text(encoding="utf-8"), path


def test_no_source_file_over_700_lines():
    # the design's limit: a file that grows past this is asking to be split
    long = {str(p.relative_to(ROOT)): n for p in _sources("core") + _sources("app")
            if (n := len(p.read_text(encoding="utf-8").splitlines())) > 700}
    assert long == {}
