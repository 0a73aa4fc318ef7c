"""A file that changes after the learning pass is named and left out; the rest is kept.

The block cache is switched off (budget 0) so that the passes after learning read every image
from its file again. Files are changed by wrapping the pipeline's call of ``refine`` (between
the learning pass and the passes). References: the projections ``basis^T (x - mean)`` of the
images left (numpy), and the plain mean of every image first read.
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from modescope.core.engine import blockcache, pipeline
from modescope.core.engine.pipeline import AnalysisOptions, analyze, update_analysis
from modescope.core.errors import SourceError
from modescope.core.review.marks import EXCLUDE, set_marks


@pytest.fixture()
def frames(tmp_path):
    rng = np.random.default_rng(3)
    base = rng.random((3, 6, 8))
    folder = tmp_path / "frames"
    folder.mkdir()
    arrays = []
    for i in range(12):
        v = 0.4 + 0.15 * np.tensordot(rng.normal(size=3), base - 0.5, 1)
        a = np.clip(np.round(v * 255), 0, 255).astype(np.uint8)
        arrays.append(a)
        Image.fromarray(a).save(folder / f"f_{i:02d}.png")
    return folder, np.stack([a.ravel() / np.float32(255) for a in arrays], axis=1)


@pytest.fixture()
def no_cache(monkeypatch):
    monkeypatch.setattr(blockcache, "default_budget", lambda folder=None: 0)


def _change_before_passes(monkeypatch, change):
    real = pipeline.refine

    def changed_then_refine(*args, **kwargs):
        change()
        return real(*args, **kwargs)

    monkeypatch.setattr(pipeline, "refine", changed_then_refine)


@pytest.mark.parametrize("refine, lanes", [(True, 0), (False, 0), (True, 2)])
def test_analyze_leaves_out_files_changed_after_learning(frames, no_cache, monkeypatch, refine,
                                                         lanes):
    folder, x = frames
    damaged, resized = folder / "f_05.png", folder / "f_10.png"

    def change():
        damaged.write_bytes(b"no longer an image")
        Image.fromarray(np.zeros((8, 6), np.uint8)).save(resized)   # another size

    _change_before_passes(monkeypatch, change)
    result = analyze([folder], AnalysisOptions(rank=3, block_size=4, refine=refine,
                                               pass_blas_threads=lanes))
    d = result.decomposition
    assert not result.cancelled and d.exact
    keep = [i for i in range(12) if i not in (5, 10)]
    assert d.paths == tuple(str(folder / f"f_{i:02d}.png") for i in keep)
    assert d.weights.shape == (3, 10) and d.residual.shape == (10,)
    reasons = {p.path: p.reason for p in result.problems}
    assert reasons[str(damaged)] == (
        "changed or became unreadable during the analysis (cannot be decoded (Pillow does not "
        "recognise the file format)); left out of the result (the mean image still counts it "
        "as first read)")
    assert reasons[str(resized)].startswith("changed or became unreadable during the analysis "
                                            "(decoded size 8x6 differs from the reference 6x8")
    assert [p["path"] for p in d.metadata["problems"]] == [str(damaged), str(resized)]
    # the mean is the learning pass's: every image as first read
    np.testing.assert_allclose(d.mean, x.mean(axis=1), atol=1e-6)
    # the weights are the exact projections of the images kept
    centred = x[:, keep] - d.mean[:, None]
    np.testing.assert_allclose(d.weights, d.basis.T @ centred, atol=1e-5)
    np.testing.assert_allclose(d.basis.T @ d.basis, np.eye(3), atol=1e-5)
    assert d.total_energy == pytest.approx(float(np.sum(centred.astype(np.float64) ** 2)),
                                           rel=1e-5)


def test_analyze_fails_only_when_every_file_changed(frames, no_cache, monkeypatch):
    folder, _ = frames

    def change():
        for path in folder.iterdir():
            path.write_bytes(b"gone")

    _change_before_passes(monkeypatch, change)
    with pytest.raises(SourceError, match="every image changed or became unreadable during the "
                                          "analysis: .*f_00.png"):
        analyze([folder], AnalysisOptions(rank=3, block_size=4))


def _split(folder, tmp_path):
    new = tmp_path / "new"
    new.mkdir()
    for i in range(8, 12):
        (folder / f"f_{i:02d}.png").rename(new / f"f_{i:02d}.png")
    return new


def test_update_leaves_out_an_old_file_that_is_unreadable(frames, tmp_path):
    folder, x = frames
    new = _split(folder, tmp_path)
    base = analyze([folder], AnalysisOptions(rank=3)).decomposition
    base = set_marks(base, [1, 6], EXCLUDE)
    (folder / "f_02.png").write_bytes(b"damaged")
    result = update_analysis(base, [new])
    d = result.decomposition
    # the other images are refined as usual; the unreadable one is named and left out
    assert not result.cancelled and d.exact and d.n_images == 11
    assert d.paths == base.paths[:2] + base.paths[3:] + tuple(str(new / f"f_{i:02d}.png")
                                                             for i in range(8, 12))
    assert d.marks.tolist() == [0, 2, 0, 0, 0, 2, 0] + [0] * 4     # marks follow their images
    assert [(p.path, p.reason) for p in result.problems] == [
        (str(folder / "f_02.png"), "old image cannot be read again (not an image Modescope can "
                                   "read (Pillow does not recognise the file format)): left "
                                   "out of the updated analysis (the mean still counts it as "
                                   "first analysed)")]
    # weights are the exact projections of the images kept (numpy), about the model's mean
    kept = [0, 1] + list(range(3, 12))
    w = d.basis.astype(np.float64).T @ (x[:, kept] - d.mean.astype(np.float64)[:, None])
    np.testing.assert_allclose(d.weights, w, atol=1e-5)


def test_update_with_every_old_file_unreadable(frames, tmp_path):
    folder, _ = frames
    new = _split(folder, tmp_path)
    base = analyze([folder], AnalysisOptions(rank=3)).decomposition
    for i in range(8):
        (folder / f"f_{i:02d}.png").write_bytes(b"damaged")
    result = update_analysis(base, [new])
    d = result.decomposition
    assert d.exact and d.n_images == 4
    assert d.paths == tuple(str(new / f"f_{i:02d}.png") for i in range(8, 12))
    assert sorted(p.path for p in result.problems) == list(base.paths)
    assert all(p.reason.startswith("old image cannot be read again (not an image")
               for p in result.problems)


def test_update_leaves_out_an_old_file_changed_during_the_passes(frames, tmp_path, no_cache,
                                                                 monkeypatch):
    folder, x = frames
    new = _split(folder, tmp_path)
    base = analyze([folder], AnalysisOptions(rank=3)).decomposition
    base = set_marks(base, [1, 6], EXCLUDE)
    _change_before_passes(monkeypatch, lambda: (folder / "f_04.png").write_bytes(b"damaged"))
    result = update_analysis(base, [new])
    d = result.decomposition
    keep = [i for i in range(12) if i != 4]
    assert d.exact and d.n_images == 11
    assert [p.rsplit("/", 1)[-1] for p in d.paths] == [f"f_{i:02d}.png" for i in keep]
    # review marks follow their images
    assert d.marks.tolist() == [0, EXCLUDE, 0, 0, 0, EXCLUDE, 0] + [0] * 4
    assert [p.path for p in result.problems] == [str(folder / "f_04.png")]
    np.testing.assert_allclose(d.weights, d.basis.T @ (x[:, keep] - d.mean[:, None]),
                               atol=1e-5)
