"""Adding images to the analysis shown (File > Add images to this analysis)."""

from __future__ import annotations

import shutil

import numpy as np
import pytest

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.window_sources import adding, update_options
from modescope.core.engine import pipeline
from modescope.core.engine.options import AnalysisOptions

TIMEOUT = 60000


@pytest.fixture
def halves(small_collection, tmp_path):
    """The 40 demo frames split into first/ (30) and more/ (10)."""
    files = sorted(small_collection.glob("*.png"))
    first, more = tmp_path / "first", tmp_path / "more"
    first.mkdir()
    more.mkdir()
    for i, f in enumerate(files):
        shutil.copy(f, (first if i < 30 else more) / f.name)
    return first, more


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    return w


def test_add_images_updates_the_analysis(qtbot, window, halves):
    first, more = halves
    assert not window.add_images_menu.isEnabled()          # nothing to add to yet
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        assert window.start_analysis([str(first)], StoredOptions(rank=5))
    qtbot.waitUntil(lambda: window.add_images_menu.isEnabled(), timeout=2000)
    before = window.state.decomposition
    assert before.n_images == 30
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        assert window.add_images([str(more)])
        assert window.progress_label.text() == "Adding images…"
    qtbot.wait(20)
    d = window.state.decomposition
    assert d.exact and d.n_images == 40 and d.rank == 5
    assert d.paths[:30] == before.paths
    assert all(p.startswith(str(more)) for p in d.paths[30:])
    # reference: one run over both folders gives the same singular values (the core tests of
    # update_analysis check both against LAPACK's SVD)
    one = pipeline.analyze([first, more], AnalysisOptions(rank=5)).decomposition
    np.testing.assert_allclose(d.singular_values, one.singular_values, rtol=1e-4)
    assert window.statusBar().currentMessage() == (
        "Added 10 images to 30 images: the analysis now holds 40 images (not saved yet)")
    assert window.windowTitle().endswith("+ new images (not saved)")
    assert window.current_file is None               # a save asks for a name
    assert window.ingest.sources() == [str(first), str(more)]
    assert window.status_text().startswith("40 images")


def test_add_images_refused_without_an_analysis(window, halves):
    _first, more = halves
    assert window.add_images([str(more)]) is False
    assert window.statusBar().currentMessage().startswith("Cannot add images: Open or finish")
    assert window.add_images([]) is False


def test_add_nothing_new_keeps_the_analysis(qtbot, window, halves):
    first, _more = halves
    with qtbot.waitSignal(window.runner.finished, timeout=TIMEOUT):
        window.start_analysis([str(first)], StoredOptions(rank=4))
    qtbot.wait(20)
    before = window.state.decomposition
    with qtbot.waitSignal(window.runner.failed, timeout=TIMEOUT) as failed:
        assert window.add_images([str(first)])        # the same files again
    assert "no new image to add" in failed.args[0]
    qtbot.wait(20)
    assert window.state.decomposition is before       # shown again as it was


def test_update_options_use_the_rank_asked_for(small_collection):
    d = pipeline.analyze([small_collection], AnalysisOptions(rank=6)).decomposition
    partial = d.replace(exact=False, basis=d.basis[:, :2], singular_values=d.singular_values[:2],
                        weights=d.weights[:2], singular_value_error=None)
    assert partial.rank == 2
    options = update_options(partial)
    assert options.rank == 6                             # not the partial result's 2
    meta = dict(partial.metadata)
    del meta["options"]
    assert update_options(partial.replace(metadata=meta)).rank == AnalysisOptions().rank
    with pytest.raises(TypeError, match="'options' must be a dict of analysis options, got list"):
        update_options(partial.replace(metadata={"options": [1]}))


def test_adding_checks_its_argument():
    with pytest.raises(TypeError, match="decomposition must be a Decomposition, got str"):
        adding("model.npz")
