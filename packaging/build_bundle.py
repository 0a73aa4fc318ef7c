"""Build the one-folder PyInstaller bundle of Modescope and prove that it runs.

Usage (from the repository, with the ``bundle`` extra installed)::

    .venv/bin/pip install -e '.[bundle]'
    .venv/bin/python packaging/build_bundle.py [--dist DIR] [--check-only]

Steps:

1. Build the wheel (``pip wheel . --no-deps``) and unpack it into a staging folder, so that
   the bundle holds exactly what the wheel holds (the checkout's editable install maps the
   ``modescope`` namespace with an import hook that PyInstaller's analysis does not follow).
2. Run PyInstaller in one-folder mode on a small entry script that calls
   ``modescope.app.cli.main.main``; the icon goes in as data beside its module.
3. Start the bundle headless (``QT_QPA_PLATFORM=offscreen``, a temporary home, data and
   settings folder): ``modescope --version``, ``modescope demo`` (24 small frames),
   ``modescope analyze`` (rank 3) and ``modescope info`` on the result, then the desktop
   program with no argument for a few seconds: it must still be running and must have written
   the first-start demo collection into the temporary data folder.
4. Print the bundle's size on disk.

The bundle is built for the platform it runs on (PyInstaller does not cross-compile); the
checks point the data and settings folders at a temporary home through ``HOME`` and the XDG
variables, which is how Linux and macOS find them (on Windows the last check would look in
the wrong place). Everything installed in the building venv that the code imports goes in,
optional extras too (PyAV for video when the ``video`` extra is installed). Exit code 0 when
every step passed, 1 otherwise (the failing step and its output are printed).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
import zipfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
NAME = "modescope"
ENTRY = '''\
import multiprocessing
import sys

from modescope.app.cli.main import main

if __name__ == "__main__":
    multiprocessing.freeze_support()
    sys.exit(main())
'''
# modules the program never uses that PyInstaller would otherwise follow from optional imports
EXCLUDES = ("tkinter", "matplotlib", "IPython", "pytest", "sklearn", "skimage", "hypothesis",
            "PyInstaller", "setuptools", "pip")
#: seconds the desktop program must stay up (offscreen) in the last check
GUI_SECONDS = 12


class StepFailed(RuntimeError):
    """A build or check step failed; the message says which and shows its output."""


def _run(step: str, args, *, env=None, timeout=1800, cwd=None) -> subprocess.CompletedProcess:
    print(f"== {step}", flush=True)
    done = subprocess.run([str(a) for a in args], capture_output=True, text=True, env=env,
                          timeout=timeout, cwd=cwd)
    if done.returncode != 0:
        raise StepFailed(f"{step} failed (exit code {done.returncode}):\n"
                         f"{done.stdout[-4000:]}\n{done.stderr[-4000:]}")
    return done


def stage_wheel(work: Path) -> Path:
    """Build the wheel into ``work`` and unpack it; return the folder holding ``modescope/``."""
    wheels = work / "wheel"
    _run("build the wheel", [sys.executable, "-m", "pip", "wheel", ROOT, "--no-deps", "-q",
                             "-w", wheels])
    (wheel,) = wheels.glob("modescope-*.whl")
    staging = work / "staging"
    shutil.rmtree(staging, ignore_errors=True)
    with zipfile.ZipFile(wheel) as zf:
        zf.extractall(staging)
    return staging


def build(dist: Path, work: Path) -> Path:
    """Run PyInstaller; return the bundle folder (``dist/modescope``)."""
    try:
        import PyInstaller  # noqa: F401  (only to say what is missing)
    except ImportError:
        raise StepFailed("PyInstaller is not installed: pip install -e '.[bundle]'") from None
    staging = stage_wheel(work)
    entry = work / "modescope_entry.py"
    entry.write_text(ENTRY, encoding="utf-8")
    icon = staging / "modescope" / "app" / "desktop" / "resources" / "modescope.svg"
    args = [sys.executable, "-m", "PyInstaller", "--noconfirm", "--clean", "--onedir",
            "--log-level", "WARN", "--name", NAME, "--distpath", dist,
            "--workpath", work / "pyinstaller", "--specpath", work, "--paths", staging,
            "--collect-submodules", "modescope.core", "--collect-submodules", "modescope.app",
            "--add-data", f"{icon}{os.pathsep}modescope/app/desktop/resources"]
    for module in EXCLUDES:
        args += ["--exclude-module", module]
    _run("PyInstaller (one folder)", args + [entry], cwd=work)
    return dist / NAME


def _executable(bundle: Path) -> Path:
    for name in (NAME, f"{NAME}.exe"):
        if (bundle / name).is_file():
            return bundle / name
    raise StepFailed(f"no {NAME} executable in {bundle}")


def _headless_env(home: Path) -> dict:
    env = {k: v for k, v in os.environ.items()
           if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env.update(QT_QPA_PLATFORM="offscreen", HOME=str(home),
               XDG_DATA_HOME=str(home / "data"), XDG_CONFIG_HOME=str(home / "config"),
               XDG_CACHE_HOME=str(home / "cache"), APPDATA=str(home / "appdata"),
               LOCALAPPDATA=str(home / "localappdata"))
    return env


def _check_desktop(exe: Path, env: dict, home: Path) -> str:
    """Start the desktop program with no argument; it must stay up and write the demo."""
    print(f"== desktop program, offscreen, {GUI_SECONDS} s", flush=True)
    proc = subprocess.Popen([str(exe)], env=env, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)
    try:
        time.sleep(GUI_SECONDS)
        if proc.poll() is not None:
            raise StepFailed(f"the desktop program ended early (exit code {proc.returncode}):"
                             f"\n{proc.stdout.read()[-4000:]}")
    finally:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
    frames = [p for p in home.rglob("demo-tray/*.jpg")]
    if len(frames) != 240:
        raise StepFailed(f"the first start wrote {len(frames)} demo frames under {home}, "
                         "expected 240")
    return f"desktop program ran {GUI_SECONDS} s offscreen; first start wrote 240 demo frames"


def check(bundle: Path) -> list[str]:
    """Start the bundle headless; return one line per passed check."""
    exe = _executable(bundle)
    passed = []
    with tempfile.TemporaryDirectory(prefix="modescope-bundle-check-") as tmp:
        home = Path(tmp) / "home"
        home.mkdir()
        env = _headless_env(home)
        done = _run("modescope --version", [exe, "--version"], env=env, timeout=120)
        passed.append(done.stdout.strip())
        frames = Path(tmp) / "frames"
        _run("modescope demo", [exe, "demo", frames, "--frames", "24", "--size", "32x48"],
             env=env, timeout=300)
        model = Path(tmp) / "model.npz"
        _run("modescope analyze", [exe, "analyze", frames, "--rank", "3", "--quiet", "-o",
                                   model], env=env, timeout=300)
        info = _run("modescope info", [exe, "info", model], env=env, timeout=120)
        if "24" not in info.stdout:
            raise StepFailed(f"modescope info does not report the 24 images:\n{info.stdout}")
        passed.append("demo (24 frames) -> analyze (rank 3) -> info: all ran")
        passed.append(_check_desktop(exe, env, home))
    return passed


def folder_size(folder: Path) -> int:
    """Return the bytes of every regular file under ``folder`` (links not followed)."""
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file() and not p.is_symlink())


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--dist", type=Path, default=ROOT / "dist",
                        help="folder that receives the bundle folder 'modescope' "
                             "(default: dist/ in the repository)")
    parser.add_argument("--check-only", action="store_true",
                        help="do not build: check the bundle already in --dist")
    args = parser.parse_args(argv)
    dist = args.dist.resolve()
    started = time.monotonic()
    try:
        if args.check_only:
            bundle = dist / NAME
        else:
            work = ROOT / "build" / "bundle"
            work.mkdir(parents=True, exist_ok=True)
            bundle = build(dist, work)
        built = time.monotonic() - started
        lines = check(bundle)
    except StepFailed as exc:
        print(f"build_bundle: {exc}", file=sys.stderr)
        return 1
    size = folder_size(bundle)
    for line in lines:
        print(f"ok: {line}")
    print(f"bundle: {bundle}")
    print(f"size: {size / 2**20:.0f} MiB in {sum(1 for _ in bundle.rglob('*'))} entries; "
          f"build {built:.0f} s, checks {time.monotonic() - started - built:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
