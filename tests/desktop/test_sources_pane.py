"""The Sources pane's background scan: results, errors, and Stop/Rescan/close stop it promptly."""

from __future__ import annotations

import threading
import time

import pytest

from modescope.app.desktop.settings import StoredOptions
import modescope.app.desktop.views.sources as sources_module
from modescope.app.desktop.views.sources import IngestPane
from modescope.core.sources import scan as scan_module

TIMEOUT = 20000
N_FILES = 3000
PROBE_SECONDS = 0.002          # a whole scan of N_FILES takes at least 6 s


@pytest.fixture
def pane(qtbot):
    p = IngestPane(options=StoredOptions(rank=3))
    qtbot.addWidget(p)
    yield p
    assert p.shutdown(TIMEOUT)


@pytest.fixture
def slow_folder(tmp_path, monkeypatch):
    """A folder of N_FILES image files whose header reading is slowed down (and counted).

    Returns the folder, the files probed and the list of times at which the pane's scans
    (``scan_collection`` in the pane's background thread) returned or raised.
    """
    for i in range(N_FILES):
        (tmp_path / f"frame_{i:05d}.png").touch()
    probed = []
    lock = threading.Lock()

    def slow_probe(path, problems, *rest):
        time.sleep(PROBE_SECONDS)
        with lock:
            probed.append(path)
        return []

    monkeypatch.setattr(scan_module, "_probe", slow_probe)
    ended = []
    real_scan = sources_module.scan_collection

    def watched_scan(*args, **kwargs):
        try:
            return real_scan(*args, **kwargs)
        finally:
            ended.append(time.monotonic())

    monkeypatch.setattr(sources_module, "scan_collection", watched_scan)
    return tmp_path, probed, ended


def _stops_promptly(qtbot, probed, ended, stop) -> float:
    qtbot.waitUntil(lambda: len(probed) >= 5, timeout=TIMEOUT)
    t0 = time.monotonic()
    stop()
    qtbot.waitUntil(lambda: len(ended) == 1, timeout=TIMEOUT)
    return ended[0] - t0


def test_scan_result_reaches_the_pane(qtbot, pane, small_collection):
    with qtbot.waitSignal(pane.scanFinished, timeout=TIMEOUT) as blocker:
        pane.add_sources([str(small_collection)])
    source_set = blocker.args[0]
    assert source_set.n_images == 40 and source_set.reference_size == (48, 64)
    assert pane.source_set is source_set
    assert pane.summary_label.text().startswith("40 images of 48 × 64 pixels")
    assert pane.scanned_for([str(small_collection)], pane.options()) is source_set


def test_scan_error_is_a_message(qtbot, pane, broken_folder):
    with qtbot.waitSignal(pane.scanFinished, timeout=TIMEOUT) as blocker:
        pane.add_sources([str(broken_folder)])
    assert blocker.args == [None]
    assert pane.summary_label.text().startswith("No usable image: no usable image in")
    assert "frame_0.png" in pane.summary_label.text()


def test_stop_scan_stops_a_long_scan(qtbot, pane, slow_folder):
    folder, probed, ended = slow_folder
    finished = []
    pane.scanFinished.connect(finished.append)
    pane.add_sources([str(folder)])
    pane.rescan()                                   # now, not after the debounce
    seconds = _stops_promptly(qtbot, probed, ended, pane.stop_scan)
    assert seconds < 1.0
    # it stopped long before the end: the cancel check reached the core scan
    assert len(probed) < N_FILES // 4
    qtbot.wait(50)
    assert finished == [] and pane.source_set is None


def test_rescan_stops_the_older_scan(qtbot, pane, slow_folder):
    folder, probed, ended = slow_folder
    pane.add_sources([str(folder)])
    pane.rescan()
    qtbot.waitUntil(lambda: len(probed) >= 5, timeout=TIMEOUT)
    pane.source_list.selectAll()
    pane.remove_selected()                          # no sources: the rescan only stops
    pane.rescan()
    qtbot.waitUntil(lambda: len(ended) == 1, timeout=2000)
    assert len(probed) < N_FILES // 4
    assert pane.summary_label.text() == "Add a folder of aligned images, or drop one here."


def test_shutdown_stops_a_long_scan(qtbot, pane, slow_folder):
    folder, probed, ended = slow_folder
    pane.add_sources([str(folder)])
    pane.rescan()
    qtbot.waitUntil(lambda: len(probed) >= 5, timeout=TIMEOUT)
    t0 = time.monotonic()
    assert pane.shutdown(5000)
    assert time.monotonic() - t0 < 1.0
    assert len(probed) < N_FILES // 4
