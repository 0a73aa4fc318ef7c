"""Honest states: a cancelled run says it is partial and can be finished (the update path); an
opened analysis file puts its own sources in the Sources pane."""

from __future__ import annotations

import dataclasses
import os
import time

import numpy as np
import pytest

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.app.desktop.views.sources_of_model import sources_of_paths
from modescope.app.desktop.window_run import finishing
from modescope.core.engine import pipeline
from modescope.core.engine.options import AnalysisOptions
from modescope.core.output import model_file

TIMEOUT = 60000


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


def _cancel_early(qtbot, w, folder):
    def slow_analyze(sources, options, *, progress, cancel, on_partial, **kw):
        def slow_partial(d):
            on_partial(d)
            time.sleep(0.08)
        return pipeline.analyze(sources, dataclasses.replace(options, block_size=4),
                                progress=progress, cancel=cancel, on_partial=slow_partial, **kw)

    w.runner._analyze = slow_analyze
    w.runner._interval = 0.0
    stop = lambda _d: w.cancel_analysis()            # noqa: E731
    w.runner.partial.connect(stop)
    with qtbot.waitSignal(w.runner.cancelled, timeout=TIMEOUT):
        assert w.start_analysis([str(folder)], StoredOptions(rank=4))
    w.runner.partial.disconnect(stop)
    qtbot.waitUntil(lambda: not w.runner.is_running(), timeout=TIMEOUT)
    qtbot.wait(20)


def test_cancel_says_partial_and_finish_completes_it(qtbot, window, small_collection):
    w = window
    assert not w.finish_action.isEnabled()
    _cancel_early(qtbot, w, small_collection)
    d = w.state.decomposition
    assert d is not None and not d.exact and 0 < d.n_images < 40
    # nothing says the analysis is still going on
    assert "in progress" not in w.status_text()
    assert "partial result" in w.status_text()
    assert "in progress" not in w.inspector.title_label.text()
    assert "partial result" in w.inspector.title_label.text()
    assert w.windowTitle().endswith("(partial result)")
    assert "Finish the analysis" in w.statusBar().currentMessage()
    assert w.finish_action.isEnabled() and w.can_finish()
    file_menu = w.menuBar().actions()[0].menu()
    assert w.finish_action in file_menu.actions()

    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        assert w.finish_analysis()
    done = blocker.args[0].decomposition
    assert w.state.decomposition is done
    assert done.exact and done.n_images == 40
    assert done.metadata["updated_from"]["images"] == d.n_images     # the update path ran
    assert "in progress" not in w.status_text() and "partial" not in w.status_text()
    assert not w.windowTitle().endswith("(partial result)")
    assert not w.finish_action.isEnabled()
    full = pipeline.analyze([str(small_collection)], AnalysisOptions(rank=4)).decomposition
    assert sorted(done.paths) == sorted(full.paths)
    np.testing.assert_allclose(done.singular_values, full.singular_values, rtol=1e-4)


def test_finish_without_partial_says_so(window):
    assert not window.finish_analysis()
    assert "no partial result" in window.statusBar().currentMessage()


def test_finishing_runs_again_when_every_image_was_learned(small_collection):
    opts = AnalysisOptions(rank=4)
    full = pipeline.analyze([str(small_collection)], opts).decomposition
    stopped_in_passes = full.replace(exact=False, residual=None)
    result = finishing(stopped_in_passes)([str(small_collection)], opts)
    assert result.decomposition.exact and result.decomposition.n_images == 40
    assert "updated_from" not in result.decomposition.metadata
    np.testing.assert_allclose(result.decomposition.singular_values, full.singular_values,
                               rtol=1e-5)
    with pytest.raises(TypeError, match="partial must be a Decomposition"):
        finishing("model.npz")


def test_opening_a_model_describes_its_sources(qtbot, window, small_collection, tmp_path):
    w = window
    other = tmp_path / "elsewhere"
    other.mkdir()
    w.ingest.set_sources([str(other)])
    full = pipeline.analyze([str(small_collection)], AnalysisOptions(rank=3)).decomposition
    path = model_file.save_model(tmp_path / "whole.npz", full)
    assert w.open_analysis(str(path))
    assert w.ingest.sources() == [os.path.abspath(str(small_collection))]
    assert w.ingest.options().rank == 3
    # an analysis of some files of a folder lists those files, not the folder
    some = sorted(str(p) for p in small_collection.iterdir())[:5]
    part = pipeline.analyze(some, AnalysisOptions(rank=2)).decomposition
    path = model_file.save_model(tmp_path / "part.npz", part)
    assert w.open_analysis(str(path))
    assert w.ingest.sources() == [os.path.abspath(p) for p in some]
    assert w.ingest.options().rank == 2


def test_sources_of_paths(tmp_path):
    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    for folder in (a, b):
        for name in ("1.png", "2.png"):
            (folder / name).write_bytes(b"")
    (a / "notes.txt").write_text("not an image")
    paths = [str(a / "1.png"), str(a / "2.png"), str(a / "2.png"), str(b / "2.png"),
             str(tmp_path / "gone" / "x.png")]
    assert sources_of_paths(paths) == [str(a), str(b / "2.png"),
                                       str(tmp_path / "gone" / "x.png")]
    with pytest.raises(TypeError, match="single string"):
        sources_of_paths(str(a))
    with pytest.raises(TypeError, match="must hold paths"):
        sources_of_paths([3])
