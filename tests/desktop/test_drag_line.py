"""Tests of the shared debounced, snapping line drag (app/desktop/views/drag_line.py)."""

from __future__ import annotations

import pyqtgraph as pg
import pytest

from modescope.app.desktop.views.drag_line import SnapDrag


def _lines(n=2):
    return tuple(pg.InfiniteLine(1, angle=90, movable=True) for _ in range(n))


def test_drag_snaps_every_line_and_writes_debounced(qtbot):
    lines = _lines(2)
    written = []
    drag = SnapDrag(lines, lambda: (1, 10), written.append, interval_ms=30)
    lines[0].setValue(4.4)
    assert [ln.value() for ln in lines] == [4, 4]  # both snapped to the whole number
    assert written == [] and drag.pending == 4  # not yet: debounced
    lines[0].setValue(5.6)
    lines[0].setValue(7.2)
    qtbot.waitUntil(lambda: written == [7], timeout=2000)  # one write for the burst
    assert drag.pending is None
    lines[1].setValue(25.0)  # beyond the bounds: clipped
    lines[1].sigPositionChangeFinished.emit(lines[1])  # end of the drag: written at once
    assert written == [7, 10] and [ln.value() for ln in lines] == [10, 10]


def test_set_value_moves_without_writing(qtbot):
    lines = _lines(2)
    written = []
    drag = SnapDrag(lines, lambda: (1, 10), written.append, interval_ms=0)
    drag.set_value(3)
    drag.flush()
    qtbot.wait(20)
    assert [ln.value() for ln in lines] == [3, 3] and written == []


def test_no_bounds_ignores_the_drag(qtbot):
    lines = _lines(1)
    written = []
    drag = SnapDrag(lines, lambda: None, written.append, interval_ms=0)
    lines[0].setValue(2.7)
    lines[0].sigPositionChangeFinished.emit(lines[0])
    assert written == [] and drag.pending is None and lines[0].value() == 2.7


@pytest.mark.parametrize("kwargs, error, match", [
    (dict(lines=()), ValueError, "at least one line"),
    (dict(lines=("x",)), TypeError, "InfiniteLine"),
    (dict(bounds=3), TypeError, "bounds must be callable"),
    (dict(write=None), TypeError, "write must be callable"),
    (dict(interval_ms=1.5), TypeError, "interval_ms must be an int"),
    (dict(interval_ms=-1), ValueError, "0 or more, got -1"),
])
def test_bad_arguments(qtbot, kwargs, error, match):
    args = dict(lines=_lines(1), bounds=lambda: (1, 2), write=print, interval_ms=10)
    args.update(kwargs)
    with pytest.raises(error, match=match):
        SnapDrag(**args)
