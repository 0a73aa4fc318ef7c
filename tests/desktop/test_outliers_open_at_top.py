"""The Outliers view opens at the top of the ranked list with the worst image selected.

After a run finishes, the table's first visible row is the highest score; the state's selected
image is that image unless the user picked one during the run (their pick is kept, and the table
still opens at the top).
"""

from __future__ import annotations

import threading

import numpy as np
import pytest

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions
from modescope.core.engine import pipeline
from modescope.core.review.outliers import score_table

TIMEOUT = 60000


def _window(qtbot, settings, **kw) -> MainWindow:
    w = MainWindow(settings, confirm_dialogs=False, **kw)
    qtbot.addWidget(w)
    w.resize(1280, 800)
    w.show()
    qtbot.waitExposed(w)
    w.docks["outliersDock"].show()
    w.docks["outliersDock"].raise_()
    return w


def _first_visible_image(view) -> int:
    row = view.table.rowAt(0)
    assert row >= 0, "the table shows no row"
    return view.image_at(row)


def _ranking(w) -> np.ndarray:
    d = w.state.decomposition
    return score_table(d, w.state.rank, w.state.level).order


def test_finished_run_opens_at_the_worst_image(qtbot, ini_settings, small_collection):
    w = _window(qtbot, ini_settings)
    try:
        with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
            assert w.start_analysis([str(small_collection)], StoredOptions(rank=4))
        view = w.views["outliersDock"]
        view.flush()
        qtbot.wait(50)
        order = _ranking(w)
        assert w.state.decomposition.exact
        assert w.state.selected == int(order[0])
        assert _first_visible_image(view) == int(order[0])
        assert view.table.verticalScrollBar().value() == 0
        # the worst image is not image 1, so the view did move away from the old default
        assert int(order[0]) != 0
    finally:
        w.close()


def test_a_pick_made_during_the_run_is_kept(qtbot, ini_settings, small_collection):
    release = threading.Event()

    def paused_analyze(sources, options, *, on_partial=None, **kw):
        result = pipeline.analyze(sources, options, **kw)
        on_partial(result.decomposition.replace(exact=False, residual=None))
        release.wait(30)
        return result

    w = _window(qtbot, ini_settings, analyze=paused_analyze)
    try:
        assert w.start_analysis([str(small_collection)], StoredOptions(rank=4))
        qtbot.waitUntil(lambda: w.state.decomposition is not None, timeout=TIMEOUT)
        w.state.set_selected(7)                      # the user picks image 8 during the run
        with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT):
            release.set()
        view = w.views["outliersDock"]
        view.flush()
        qtbot.wait(50)
        order = _ranking(w)
        assert w.state.selected == 7
        assert _first_visible_image(view) == int(order[0])
    finally:
        release.set()
        w.close()


def test_select_worst_without_scores_changes_nothing(qtbot, ini_settings):
    w = _window(qtbot, ini_settings)
    try:
        assert w.views["outliersDock"].select_worst() == -1
        assert w.state.selected == -1
    finally:
        w.close()
