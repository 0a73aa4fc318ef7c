"""Settings round trip through a temporary INI file."""

from __future__ import annotations

import os

import pytest
from PySide6.QtCore import QByteArray, QSettings

from modescope.app.desktop.settings import MAX_RECENT, Settings, StoredOptions


def _reopen(settings: Settings, path) -> Settings:
    """A second Settings over the same INI file ``path``, as a new start of the program would
    see it."""
    settings.sync()
    return Settings(QSettings(str(path), QSettings.Format.IniFormat))


def test_defaults_when_empty(ini_settings):
    assert ini_settings.options() == StoredOptions()
    assert ini_settings.recent_files() == []
    assert ini_settings.window_geometry().isEmpty()
    assert ini_settings.window_state().isEmpty()
    assert ini_settings.last_dir() == ""


def test_options_round_trip(ini_settings, ini_path):
    wanted = StoredOptions(rank=7, color="rgb", downscale=3, recursive=True,
                           resize_mismatched=True)
    ini_settings.set_options(wanted)
    again = _reopen(ini_settings, ini_path).options()
    assert again == wanted
    # the INI backend stores text: the types must come back as int/bool/str
    assert type(again.rank) is int and type(again.recursive) is bool


def test_options_accept_pipeline_options(ini_settings, ini_path):
    from modescope.core.engine.pipeline import AnalysisOptions

    ini_settings.set_options(AnalysisOptions(rank=9, color="rgb", downscale=2))
    got = _reopen(ini_settings, ini_path).options()
    assert (got.rank, got.color, got.downscale, got.recursive) == (9, "rgb", 2, False)


def test_damaged_values_fall_back_to_defaults(ini_settings, ini_path):
    store = QSettings(str(ini_path), QSettings.Format.IniFormat)     # the file, edited by hand
    store.setValue("options/rank", "many")
    store.setValue("options/color", "sepia")
    store.setValue("options/downscale", "-4")
    store.setValue("options/recursive", "perhaps")
    store.sync()
    got = _reopen(ini_settings, ini_path).options()
    assert got.rank == StoredOptions().rank
    assert got.color == "gray"
    assert got.downscale == 1            # clamped to the smallest factor
    assert got.recursive is False


def test_set_options_rejects_bad_input(ini_settings):
    with pytest.raises(TypeError, match="rank"):
        ini_settings.set_options(object())
    with pytest.raises(ValueError, match="color"):
        ini_settings.set_options(StoredOptions(color="cmyk"))


@pytest.mark.parametrize("names", [["one.npz"], ["one.npz", "two words.npz"]])
def test_recent_files_round_trip(ini_settings, ini_path, tmp_path, names):
    # a list of one element comes back from INI as a plain string unless the wrapper fixes it
    paths = [str(tmp_path / name) for name in names]
    ini_settings.set_recent_files(paths)
    assert _reopen(ini_settings, ini_path).recent_files() == paths


def test_recent_files_order_and_limit(ini_settings, ini_path, tmp_path):
    paths = [str(tmp_path / f"a{i}.npz") for i in range(MAX_RECENT + 3)]
    for p in paths:
        ini_settings.add_recent_file(p)
    again = _reopen(ini_settings, ini_path)
    recent = again.recent_files()
    assert recent == list(reversed(paths))[:MAX_RECENT]
    again.add_recent_file(paths[-5])          # re-adding moves it to the front, no duplicate
    assert again.recent_files()[0] == paths[-5]
    assert again.recent_files().count(paths[-5]) == 1
    again.remove_recent_file(paths[-5])
    assert paths[-5] not in again.recent_files()


def test_recent_file_is_stored_absolute(ini_settings, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    ini_settings.add_recent_file("model.npz")
    assert ini_settings.recent_files() == [os.path.join(str(tmp_path), "model.npz")]


def test_window_bytes_round_trip(ini_settings, ini_path):
    geometry = QByteArray(bytes(range(256)))
    state = QByteArray(b"\x00\x01state\xff")
    ini_settings.set_window_geometry(geometry)
    ini_settings.set_window_state(state)
    again = _reopen(ini_settings, ini_path)
    assert bytes(again.window_geometry()) == bytes(range(256))
    assert bytes(again.window_state()) == b"\x00\x01state\xff"


def test_default_store_names(monkeypatch):
    import modescope.app.desktop.settings as settings_module

    made = []                    # the stores opened, never the user's own (nothing is written)
    monkeypatch.setattr(settings_module, "QSettings",
                        lambda *args: made.append(args) or QSettings(*args))
    Settings()
    assert made == [("Modescope", "Modescope")]     # organisation and application


def test_rejects_wrong_store_type():
    with pytest.raises(TypeError, match="qsettings"):
        Settings("not a store")
