"""The wheel works on its own: built with ``pip wheel . --no-deps``, it holds every module and
the icon, and installed into a fresh venv it gives a working ``modescope`` command.

Installing the dependencies into a fresh venv would download a few hundred MB on every run, so
the fresh venv is made without pip, the wheel is installed into it by this venv's pip with
``--no-deps``, and a ``.pth`` line puts this venv's site-packages after its own (a plain path:
the editable install's finder there is not loaded). What is imported as ``modescope`` then comes
from the wheel only, which each check below asserts.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import sysconfig
import tomllib
import zipfile
from pathlib import Path

import pytest
from packaging.requirements import Requirement

ROOT = Path(__file__).resolve().parents[2]
SOURCES = {"core": "modescope/core", "app": "modescope/app"}


def _run(args, **kwargs) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env.update(kwargs.pop("env", {}))
    return subprocess.run([str(a) for a in args], capture_output=True, text=True, env=env,
                          timeout=kwargs.pop("timeout", 300), **kwargs)


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("wheel")
    done = _run([sys.executable, "-m", "pip", "wheel", ROOT, "--no-deps", "-q", "-w", out])
    assert done.returncode == 0, done.stderr[-3000:]
    (built,) = out.glob("modescope-*.whl")
    return built


@pytest.fixture(scope="module")
def installed(wheel, tmp_path_factory) -> Path:
    """A fresh venv holding the wheel; returns its ``bin`` (``Scripts`` on Windows) folder."""
    venv = tmp_path_factory.mktemp("fresh") / "venv"
    done = _run([sys.executable, "-m", "venv", "--without-pip", venv])
    assert done.returncode == 0, done.stderr
    bindir = venv / ("Scripts" if os.name == "nt" else "bin")
    python = next(p for p in (bindir / "python", bindir / "python.exe") if p.exists())
    done = _run([sys.executable, "-m", "pip", "--python", python, "install", "-q", "--no-deps",
                 wheel])
    assert done.returncode == 0, done.stderr[-3000:]
    site = _run([python, "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"])
    ours = sysconfig.get_path("purelib")
    Path(site.stdout.strip(), "zz-modescope-test-dependencies.pth").write_text(ours + "\n")
    return bindir


def _python(bindir: Path) -> Path:
    return next(p for p in (bindir / "python", bindir / "python.exe") if p.exists())


def test_the_wheel_holds_every_module_and_the_icon(wheel):
    with zipfile.ZipFile(wheel) as zf:
        names = set(zf.namelist())
    expected = set()
    for folder, prefix in SOURCES.items():
        for path in (ROOT / folder).rglob("*.py"):
            expected.add(f"{prefix}/{path.relative_to(ROOT / folder).as_posix()}")
    assert expected and expected - names == set()
    assert "modescope/app/desktop/resources/modescope.svg" in names
    assert not any("/tests/" in n or n.startswith("tests/") for n in names)


def test_the_wheel_declares_the_command_and_every_dependency(wheel):
    with zipfile.ZipFile(wheel) as zf:
        dist = next(n.split("/")[0] for n in zf.namelist() if n.endswith(".dist-info/METADATA"))
        entry_points = zf.read(f"{dist}/entry_points.txt").decode()
        metadata = zf.read(f"{dist}/METADATA").decode()
    assert "modescope = modescope.app.cli.main:main" in entry_points
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    required = [line.split(":", 1)[1].strip() for line in metadata.splitlines()
                if line.startswith("Requires-Dist:") and "extra ==" not in line]
    assert "platformdirs>=3.0" in project["dependencies"]

    def parsed(texts):       # name -> specifier set (compared as sets, whatever the order)
        return {Requirement(t).name.lower(): Requirement(t).specifier for t in texts}

    assert parsed(required) == parsed(project["dependencies"])


def test_the_installed_command_runs_from_the_wheel(installed):
    command = next(p for p in (installed / "modescope", installed / "modescope.exe")
                   if p.exists())
    done = _run([command, "--version"])
    assert (done.returncode, done.stdout.strip()) == (0, "modescope 0.1.0")


SCRIPT = r"""
import importlib, json, pkgutil, sys
from pathlib import Path
import modescope.app, modescope.core
site = Path(sys.argv[1])
names = []
for package in (modescope.core, modescope.app):
    for info in pkgutil.walk_packages(package.__path__, package.__name__ + "."):
        names.append(info.name)
modules = [importlib.import_module(n) for n in names]
outside = [m.__name__ for m in modules if site not in Path(m.__file__).resolve().parents]
from modescope.app.desktop import icon, launch, window_files
folder = launch.ensure_demo_collection(sys.argv[2])
print(json.dumps({"modules": names, "outside": outside,
                  "icon": icon.icon_path().is_file(),
                  "sample": window_files.sample_images_dir().exists(),
                  "demo": sorted(p.name for p in folder.iterdir())}))
"""


def test_every_module_imports_from_the_install_and_the_first_start_has_its_demo(installed,
                                                                                tmp_path):
    python = _python(installed)
    site = _run([python, "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"])
    done = _run([python, "-c", SCRIPT, Path(site.stdout.strip()).resolve(), tmp_path / "data"],
                cwd=tmp_path, env={"QT_QPA_PLATFORM": "offscreen"})
    assert done.returncode == 0, done.stderr[-3000:]
    found = json.loads(done.stdout.splitlines()[-1])
    in_tree = {f"modescope.{folder}." + ".".join(p.relative_to(ROOT / folder).with_suffix("")
                                                 .parts).removesuffix(".__init__")
               for folder in SOURCES for p in (ROOT / folder).rglob("*.py")
               if p.name != "__init__.py" or p.parent != ROOT / folder}
    assert set(found["modules"]) == in_tree
    assert found["outside"] == []            # nothing came from the checkout
    assert found["icon"] is True
    assert found["sample"] is False          # an install has no sample_images/ ...
    assert len(found["demo"]) == 241         # ... so the first start writes 240 frames + note
    assert found["demo"][-1] == "tray_d10_h23.jpg" and "README.txt" in found["demo"]


def test_the_installed_command_analyses_the_demo(installed, tmp_path):
    command = next(p for p in (installed / "modescope", installed / "modescope.exe")
                   if p.exists())
    frames = tmp_path / "frames"
    done = _run([command, "demo", frames, "--frames", "24", "--size", "32x48"])
    assert done.returncode == 0, done.stderr
    model = tmp_path / "model.npz"
    done = _run([command, "analyze", frames, "--rank", "3", "--quiet", "-o", model])
    assert done.returncode == 0, done.stderr
    done = _run([command, "info", model])
    assert done.returncode == 0 and "24" in done.stdout
