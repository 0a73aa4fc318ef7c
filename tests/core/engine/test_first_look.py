"""With a partial-result callback, analyze shows the first block before the whole scan.

The result must not depend on it: the same collection analysed with and without a callback
gives the same numbers (the reference is the run without the quick look, itself checked
against LAPACK elsewhere), and when the full scan disagrees with the quick look (the most
common size is not the first images' size) the analysis starts afresh.
"""

import numpy as np
import pytest
from PIL import Image

import modescope.core.engine.pipeline as pipeline

from modescope.core import AnalysisOptions, analyze


@pytest.fixture(autouse=True)
def few_files_are_enough(monkeypatch):
    monkeypatch.setattr(pipeline, "FIRST_LOOK_FILES", 5)


def _write(folder, n, size=(12, 10), seed=0, start=0):
    rng = np.random.default_rng(seed)
    folder.mkdir(exist_ok=True)
    for i in range(n):
        pixels = rng.integers(0, 256, size=size, dtype=np.uint8)
        Image.fromarray(pixels).save(folder / f"f_{start + i:04d}.png")


def test_first_partial_comes_from_the_first_images_only(tmp_path):
    _write(tmp_path / "c", 70)
    seen = []
    opts = AnalysisOptions(rank=4, block_size=16)
    result = analyze([tmp_path / "c"], opts, on_partial=seen.append)
    assert seen and seen[0].n_images == 16          # the quick look: one block
    assert seen[-1].n_images > 16 or len(seen) == 1
    plain = analyze([tmp_path / "c"], opts)
    d, ref = result.decomposition, plain.decomposition
    assert d.n_images == ref.n_images == 70
    assert d.paths == ref.paths
    np.testing.assert_allclose(d.singular_values, ref.singular_values, rtol=1e-6)
    np.testing.assert_allclose(np.abs(d.weights), np.abs(ref.weights), rtol=1e-4, atol=1e-5)


def test_a_full_scan_that_disagrees_starts_afresh(tmp_path):
    # 20 small images first, then 50 of another size: the most common size is the second,
    # so the first images are refused by the full scan
    _write(tmp_path / "c", 20, size=(8, 8))
    _write(tmp_path / "c", 50, size=(12, 10), seed=1, start=20)
    seen = []
    opts = AnalysisOptions(rank=3, block_size=16)
    result = analyze([tmp_path / "c"], opts, on_partial=seen.append)
    assert seen[0].image_shape[:2] == (8, 8)        # what the quick look saw
    d = result.decomposition
    assert d.image_shape[:2] == (12, 10) and d.n_images == 50
    ref = analyze([tmp_path / "c"], opts).decomposition
    np.testing.assert_allclose(d.singular_values, ref.singular_values, rtol=1e-6)
    assert sum("differs from the reference" in p.reason for p in result.problems) == 20


def test_a_collection_smaller_than_the_look(tmp_path):
    _write(tmp_path / "c", 9)
    seen = []
    result = analyze([tmp_path / "c"], AnalysisOptions(rank=2, block_size=16),
                     on_partial=seen.append)
    assert result.decomposition.n_images == 9 and not result.cancelled
    assert seen[0].n_images == 9


def test_no_quick_look_below_the_file_count(tmp_path, monkeypatch):
    monkeypatch.setattr(pipeline, "FIRST_LOOK_FILES", 71)
    _write(tmp_path / "c", 70)
    progress, seen = [], []
    analyze([tmp_path / "c"], AnalysisOptions(rank=3, block_size=16), progress=progress.append,
            on_partial=lambda d: seen.append((d.n_images, len(progress))))
    # the first partial comes after the whole scan was reported
    first_images, reports_before = seen[0]
    assert first_images == 16
    assert any(p.stage == "scan" and p.done == p.total == 70
               for p in progress[:reports_before])


def test_scan_limit_reads_only_the_first_headers(tmp_path):
    from modescope.core.sources.scan import scan_sources
    _write(tmp_path / "c", 12)
    looked = []
    head = scan_sources([tmp_path / "c"], limit=5, progress=lambda done, total: looked.append(done))
    assert [r.path.rsplit("/", 1)[-1] for r in head.images] == [f"f_{i:04d}.png" for i in range(5)]
    assert looked[-1] == 5                       # stopped after the fifth header
    import pytest
    with pytest.raises(ValueError, match="limit"):
        scan_sources([tmp_path / "c"], limit=0)
