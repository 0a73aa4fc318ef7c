"""The first start of an installed program: no ``sample_images/`` beside the code, so
:func:`modescope.app.desktop.launch.start_window` writes the demo collection into the data
folder (a temporary one here) and opens it; and the window carries the program's icon.
"""

from __future__ import annotations

import importlib
import os

import numpy as np
import pytest
from PIL import Image
from PySide6.QtCore import QSettings

from modescope.app.desktop import launch
from modescope.app.desktop.launch import (DEMO_FRAMES, demo_folder, ensure_demo_collection,
                                          start_window)
from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import Settings
from modescope.core import demo


@pytest.fixture
def window(qtbot, tmp_path):
    settings = Settings(QSettings(str(tmp_path / "first-start.ini"), QSettings.Format.IniFormat))
    w = MainWindow(settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def _window_files():
    # the module as sys.modules holds it now (a test elsewhere imports the window's modules
    # afresh, which leaves the package attribute pointing at another copy)
    return importlib.import_module("modescope.app.desktop.window_files")


@pytest.fixture
def no_sample(monkeypatch, tmp_path):
    """Make the repository's sample folder absent, as in an installed wheel."""
    missing = tmp_path / "site-packages" / "sample_images"
    monkeypatch.setattr(_window_files(), "sample_images_dir", lambda: missing)
    return missing


def _frame_names() -> list[str]:
    return [demo.frame_name(i, DEMO_FRAMES) for i in range(DEMO_FRAMES)]


def test_first_start_without_the_sample_writes_and_opens_the_demo(window, no_sample, tmp_path,
                                                                  monkeypatch):
    data = tmp_path / "data"
    opened = []
    monkeypatch.setattr(window, "open_paths", lambda paths: opened.append(list(paths)))
    monkeypatch.setattr(window, "open_sample", lambda: pytest.fail("no sample to open"))
    messages = []
    window.statusBar().messageChanged.connect(lambda text: text and messages.append(text))
    assert start_window(window, [], data_dir=data) == "demo"
    folder = data / "demo-tray"
    assert opened == [[str(folder)]]
    names = sorted(p.name for p in folder.iterdir())
    assert names == sorted(_frame_names() + ["README.txt"])
    assert (folder / "README.txt").read_text(encoding="utf-8").startswith(
        "Invented demo images written by Modescope")
    assert messages[0] == (f"First start: writing the invented demo collection into {folder} "
                           f"(1 of 240 frames)")
    assert messages[-1].endswith("(240 of 240 frames)") and len(messages) == 11
    # the frames are the generator's own (JPEG quality 90: within a few levels on average;
    # a tolerance from this codec setting, a rule of thumb)
    first = np.asarray(Image.open(folder / _frame_names()[0]), dtype=np.float64)
    assert first.shape == (96, 128, 3)
    assert np.abs(first - demo.render_frame(0).astype(np.float64)).mean() < 3.0


def test_the_demo_is_written_once_and_again_when_cut_short(tmp_path):
    folder = ensure_demo_collection(tmp_path)
    assert folder == demo_folder(tmp_path) == tmp_path / "demo-tray"
    frame = folder / _frame_names()[5]
    stamp = frame.stat().st_mtime_ns
    os.utime(frame, ns=(stamp - 10**9, stamp - 10**9))
    assert ensure_demo_collection(tmp_path) == folder
    assert frame.stat().st_mtime_ns == stamp - 10**9          # complete: left as it was
    (folder / _frame_names()[7]).unlink()                    # cut short: written again
    calls = []
    ensure_demo_collection(tmp_path, progress=lambda done, total: calls.append((done, total)))
    assert calls[-1] == (DEMO_FRAMES, DEMO_FRAMES) and len(calls) == DEMO_FRAMES
    assert (folder / _frame_names()[7]).is_file()
    (folder / "notes.txt").write_text("mine")                # other files stay
    (folder / "README.txt").unlink()
    ensure_demo_collection(tmp_path)
    assert (folder / "notes.txt").read_text() == "mine"
    assert len(list(folder.glob("*.jpg"))) == DEMO_FRAMES


def test_the_repository_sample_is_still_preferred(window, tmp_path, monkeypatch):
    sample = tmp_path / "sample_images"
    sample.mkdir()
    Image.new("RGB", (8, 8)).save(sample / "a.png")
    monkeypatch.setattr(_window_files(), "sample_images_dir", lambda: sample)
    opened = []
    monkeypatch.setattr(window, "open_sample", lambda: opened.append("sample") or True)
    assert start_window(window, [], data_dir=tmp_path / "data") == "sample"
    assert opened == ["sample"] and not (tmp_path / "data").exists()


def test_an_unwritable_data_folder_gives_a_message_not_a_crash(window, no_sample, tmp_path,
                                                               monkeypatch):
    blocker = tmp_path / "data"
    blocker.write_text("a file where the data folder should be")
    monkeypatch.setattr(window, "open_paths", lambda paths: pytest.fail("nothing to open"))
    assert start_window(window, [], data_dir=blocker) == "no demo"
    message = window.statusBar().currentMessage()
    assert message.startswith("Could not write the demo collection")
    assert str(blocker) in message and "Add a folder" in message


def test_bad_arguments_are_named(tmp_path):
    with pytest.raises(TypeError, match="data_dir"):
        demo_folder(3)
    with pytest.raises(TypeError, match="progress"):
        ensure_demo_collection(tmp_path, progress="often")


def test_the_default_data_folder_is_the_users_own(monkeypatch, tmp_path):
    import platformdirs

    monkeypatch.setattr(platformdirs, "user_data_dir",
                        lambda name, appauthor=None: str(tmp_path / f"{name}-{appauthor}"))
    assert launch.demo_folder() == tmp_path / "modescope-False" / "demo-tray"


def test_the_window_carries_the_program_icon(window):
    # Qt draws the SVG through its image plugin: pixels must come out, not a blank square
    assert not window.windowIcon().isNull()
    image = window.windowIcon().pixmap(64, 64).toImage()
    assert (image.width(), image.height()) == (64, 64)
    colours = {image.pixelColor(c, r).name() for r in range(0, 64, 4) for c in range(0, 64, 4)}
    assert len(colours) > 5
