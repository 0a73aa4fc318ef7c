"""Soak: 50 start/cancel cycles of a real analysis in the workbench leave no threads, open
files or memory behind, and the window still analyses afterwards."""

from __future__ import annotations

import gc
import os
import threading
import time

import pytest

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.settings import StoredOptions

TIMEOUT = 60000
CYCLES = 50
N_IMAGES = 160

#: Bound on the growth of the resident memory over the 50 cycles. One run of the collection
#: decodes about 2 MB of pixels (160 images of 48 x 64 float32) and makes models, views' copies
#: and thumbnails besides, so a run kept alive by mistake in each cycle would cost at least
#: 100 MB over the cycles; below the bound the figure is the allocator's and Qt's caches,
#: which settle after the first cycles.
RSS_GROWTH_LIMIT = 50 * 2 ** 20

#: Open files allowed beyond the start (Qt may open a font or an event file on first use).
FD_MARGIN = 4


@pytest.fixture(scope="module")
def collection(tmp_path_factory):
    """160 demo frames of 48x64 pixels (PNG): large enough that most cancels land mid-run."""
    from modescope.core import demo

    folder = tmp_path_factory.mktemp("soak")
    demo.write_collection(folder, N_IMAGES, size=(48, 64), seed=4, fmt="png")
    return folder


def _rss() -> int:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def _open_files() -> int:
    return len(os.listdir("/proc/self/fd"))


@pytest.fixture
def window(qtbot, ini_settings):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.show()
    qtbot.waitExposed(w)
    yield w
    w.close()


def _cycle(qtbot, w, folder, when: str) -> str:
    """Start a run and cancel it ``when`` ("now", "progress" or "partial"); return how the run
    ended ("cancelled" or "finished")."""
    ended = []
    on_cancel = w.runner.cancelled.connect(lambda _r: ended.append("cancelled"))
    on_finish = w.runner.finished.connect(lambda _r: ended.append("finished"))
    signal = {"progress": w.runner.progress, "partial": w.runner.partial}.get(when)
    hook = None if signal is None else signal.connect(lambda *_: w.cancel_analysis())
    try:
        assert w.start_analysis([str(folder)], StoredOptions(rank=4))
        if when == "now":
            w.cancel_analysis()
        qtbot.waitUntil(lambda: bool(ended) and not w.runner.is_running(), timeout=TIMEOUT)
    finally:
        for connection, sig in ((on_cancel, w.runner.cancelled),
                                (on_finish, w.runner.finished), (hook, signal)):
            if connection is not None:
                sig.disconnect(connection)
    return ended[0]


def _settled(w, threads: int) -> bool:
    return threading.active_count() <= threads and w.runner.pool.activeThreadCount() == 0


def test_fifty_start_cancel_cycles(qtbot, window, collection):
    w = window
    t0 = time.monotonic()
    for when in ("now", "partial"):                     # warm up: imports, pools, caches
        _cycle(qtbot, w, collection, when)
    qtbot.wait(50)
    gc.collect()
    threads, pool = threading.active_count(), w.runner.pool.activeThreadCount()
    files, rss = _open_files(), _rss()
    assert pool == 0

    ends = [_cycle(qtbot, w, collection, ("now", "progress", "partial")[i % 3])
            for i in range(CYCLES)]
    qtbot.waitUntil(lambda: _settled(w, threads), timeout=5000)
    qtbot.wait(50)
    gc.collect()
    assert threading.active_count() == threads
    assert w.runner.pool.activeThreadCount() == pool
    assert _open_files() <= files + FD_MARGIN
    growth = _rss() - rss
    assert growth < RSS_GROWTH_LIMIT, f"resident memory grew by {growth / 2 ** 20:.1f} MB"
    # the cancels really stopped runs (48 of 50 here; the "now" third always does)
    assert ends.count("cancelled") >= CYCLES // 2
    assert all(e in ("cancelled", "finished") for e in ends)

    # the window still works: a full run finishes and reaches the views
    with qtbot.waitSignal(w.runner.finished, timeout=TIMEOUT) as blocker:
        assert w.start_analysis([str(collection)], StoredOptions(rank=4))
    d = blocker.args[0].decomposition
    assert d.exact and d.n_images == N_IMAGES and w.state.decomposition is d
    assert w.statusBar().currentMessage().startswith(f"Analysis finished: {N_IMAGES} images")
    qtbot.waitUntil(lambda: w.views["imagesDock"].model.rowCount() == N_IMAGES, timeout=5000)
    assert time.monotonic() - t0 < 60                 # about 5 s here; far above means a stall
