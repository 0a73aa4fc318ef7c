"""Learning while the scan still reads headers (core/engine/headstart.py).

The result must not depend on it: the same collection analysed with the head start and
without it (HEADSTART_FILES above the file count) gives the same numbers; the reference run is
itself checked against LAPACK in test_pipeline.py. When the full scan disagrees with what was
learned (the most common size is not the first images' size) the analysis starts afresh.
"""

import threading

import numpy as np
import pytest
from PIL import Image

import modescope.core.engine.headstart as headstart
from modescope.core import AnalysisOptions, analyze
from modescope.core.sources.scan import scan_sources


@pytest.fixture(autouse=True)
def few_files_are_enough(monkeypatch):
    monkeypatch.setattr(headstart, "HEADSTART_FILES", 5)


def _write(folder, n, size=(12, 10), seed=0, start=0):
    rng = np.random.default_rng(seed)
    folder.mkdir(exist_ok=True)
    for i in range(n):
        pixels = rng.integers(0, 256, size=size, dtype=np.uint8)
        Image.fromarray(pixels).save(folder / f"f_{start + i:04d}.png")


def _slow_scan(monkeypatch, seconds=0.002):
    """Make every header read take a little longer, so that learning overlaps the scan."""
    import modescope.core.sources.scan as scan_module
    real = scan_module._probe

    def probe(*args, **kwargs):
        threading.Event().wait(seconds)
        return real(*args, **kwargs)
    monkeypatch.setattr(scan_module, "_probe", probe)


def test_same_result_with_and_without_the_head_start(tmp_path, monkeypatch):
    _write(tmp_path / "c", 90)
    _slow_scan(monkeypatch)
    seen, stages = [], []
    opts = AnalysisOptions(rank=4, block_size=16)
    result = analyze([tmp_path / "c"], opts, on_partial=seen.append,
                     progress=lambda p: stages.append((p.stage, p.done, p.total)))
    # the first partial came from the first block while the scan was still running
    assert seen[0].n_images == 16
    # progress stays in order: every learning report after the scan's last one, the first
    # of them already past the block learned during the scan
    scan_end = max(i for i, s in enumerate(stages) if s[0] == "scan")
    learn_reports = [(i, s) for i, s in enumerate(stages) if s[0] == "learn"]
    assert learn_reports[0][0] > scan_end
    assert learn_reports[0][1][1] == 16
    monkeypatch.setattr(headstart, "HEADSTART_FILES", 10 ** 9)
    plain = analyze([tmp_path / "c"], opts)
    d, ref = result.decomposition, plain.decomposition
    assert d.n_images == ref.n_images == 90
    assert d.paths == ref.paths
    np.testing.assert_allclose(d.singular_values, ref.singular_values, rtol=1e-6)
    np.testing.assert_allclose(np.abs(d.weights), np.abs(ref.weights), rtol=1e-4, atol=1e-5)
    assert [s for s in stages if s[0] == "learn"][-1][1:] == (90, 90)


def test_a_full_scan_that_disagrees_starts_afresh(tmp_path, monkeypatch):
    # 40 small images first, then 60 of another size: the most common size is the second,
    # so the first images are refused by the full scan
    _write(tmp_path / "c", 40, size=(8, 8))
    _write(tmp_path / "c", 60, size=(12, 10), seed=1, start=40)
    _slow_scan(monkeypatch)
    seen = []
    opts = AnalysisOptions(rank=3, block_size=16)
    result = analyze([tmp_path / "c"], opts, on_partial=seen.append)
    assert seen[0].image_shape[:2] == (8, 8)        # what was learned during the scan
    d = result.decomposition
    assert d.image_shape[:2] == (12, 10) and d.n_images == 60
    monkeypatch.setattr(headstart, "HEADSTART_FILES", 10 ** 9)
    ref = analyze([tmp_path / "c"], opts).decomposition
    np.testing.assert_allclose(d.singular_values, ref.singular_values, rtol=1e-6)
    assert sum("differs from the reference" in p.reason for p in result.problems) == 40


def test_a_collection_smaller_than_a_block(tmp_path):
    _write(tmp_path / "c", 9)
    seen = []
    result = analyze([tmp_path / "c"], AnalysisOptions(rank=2, block_size=16),
                     on_partial=seen.append)
    assert result.decomposition.n_images == 9 and not result.cancelled
    assert seen[0].n_images == 9


def test_no_head_start_below_the_file_count(tmp_path, monkeypatch):
    monkeypatch.setattr(headstart, "HEADSTART_FILES", 71)
    _write(tmp_path / "c", 70)
    progress, seen = [], []
    analyze([tmp_path / "c"], AnalysisOptions(rank=3, block_size=16), progress=progress.append,
            on_partial=lambda d: seen.append((d.n_images, len(progress))))
    # the first partial comes after the whole scan was reported
    first_images, reports_before = seen[0]
    assert first_images == 16
    assert any(p.stage == "scan" and p.done == p.total == 70
               for p in progress[:reports_before])


def test_cancel_during_the_scan_keeps_what_was_learned(tmp_path, monkeypatch):
    _write(tmp_path / "c", 200)
    _slow_scan(monkeypatch, seconds=0.01)
    seen = []
    result = analyze([tmp_path / "c"], AnalysisOptions(rank=3, block_size=16),
                     on_partial=seen.append, cancel=lambda: len(seen) > 0)
    assert result.cancelled
    d = result.decomposition
    assert d is not None and d.n_images == 16 and not d.exact


def test_scan_errors_reach_the_caller(tmp_path):
    from modescope.core.errors import NoUsableImagesError
    (tmp_path / "empty").mkdir()
    with pytest.raises(NoUsableImagesError, match="no usable image"):
        analyze([tmp_path / "empty"], AnalysisOptions(rank=2), on_partial=lambda d: None)


def test_scan_found_list_receives_every_image_in_order(tmp_path):
    _write(tmp_path / "c", 12)
    found = []
    result = scan_sources([tmp_path / "c"], found=found)
    assert tuple(found) == result.images
    with pytest.raises(ValueError, match="empty list"):
        scan_sources([tmp_path / "c"], found=[1])
    with pytest.raises(TypeError, match="found must be a list"):
        scan_sources([tmp_path / "c"], found=())
