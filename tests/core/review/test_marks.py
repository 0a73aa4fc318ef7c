"""Tests of modescope.core.review.marks: marks, lists, CSV and path-list export, refit without the
excluded images.

References: the csv module of the standard library reads the exports back; numpy's LAPACK SVD
builds the fixtures; an independent run of modescope.core.engine.pipeline.analyze on the remaining
files is the reference of the refit.
"""

from __future__ import annotations

import csv
import os

import numpy as np
import pytest
from PIL import Image

from modescope.core.output import atomic
from modescope.core.output.atomic import DestinationError
from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.errors import ModescopeError, NoUsableImagesError
from modescope.core.review.outliers import score_table
from modescope.core.review.marks import (
    CSV_COLUMNS, EXCLUDE, KEEP, NOT_REVIEWED, clear_marks, excluded_indices, flagged_indices,
    kept_indices, refit_without_excluded, remaining_sources, set_marks, table_rows, write_csv,
    write_path_list)


def make_decomposition(X, K, image_shape=None, paths=None, pages=None) -> Decomposition:
    """Exact mean-centred SVD of the columns of X (numpy LAPACK), keeping K modes."""
    X = np.asarray(X, dtype=np.float64)
    mean = X.mean(axis=1)
    C = X - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U[:, :K], s[:K, None] * Vt[:K])
    residual = np.sum((C - basis @ weights) ** 2, axis=0)
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:K].copy(), weights=weights,
                         total_energy=float(np.sum(C ** 2)),
                         image_shape=image_shape or (X.shape[0], 1, 1),
                         paths=tuple(paths) if paths else (),
                         pages=None if pages is None else np.asarray(pages, dtype=np.int32),
                         residual=residual, exact=True)


@pytest.fixture
def model():
    rng = np.random.default_rng(0)
    X = 0.5 + 0.1 * rng.standard_normal((64, 3)) @ rng.standard_normal((3, 80))
    X += 0.01 * rng.standard_normal(X.shape)
    X[:, 7] += 0.5          # two clear outliers
    X[:16, 33] = 1.5
    paths = [f"/data/frame_{i:03d}.png" for i in range(80)]
    return make_decomposition(X, 10, image_shape=(8, 8, 1), paths=paths)


def _read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def _no_temp_files(folder):
    return not [name for name in os.listdir(folder) if atomic.is_temp_name(name)]


# ----- marks ---------------------------------------------------------------------------------

def test_set_marks_returns_a_new_decomposition(model):
    marked = set_marks(model, [3, 7], EXCLUDE)
    assert marked is not model
    assert model.marks.tolist() == [0] * 80
    assert marked.marks.dtype == np.int8
    assert np.flatnonzero(marked.marks).tolist() == [3, 7]
    assert marked.marks[3] == 2
    marked = set_marks(marked, 3, KEEP)
    assert marked.marks[3] == 1 and marked.marks[7] == 2
    assert excluded_indices(marked).tolist() == [7]
    assert kept_indices(marked).tolist() == [i for i in range(80) if i != 7]
    assert set_marks(marked, np.array([7]), NOT_REVIEWED).marks.tolist() == \
        [0, 0, 0, 1] + [0] * 76
    assert clear_marks(marked).marks.tolist() == [0] * 80
    np.testing.assert_array_equal(marked.weights, model.weights)   # nothing else changes
    assert set_marks(model, [], EXCLUDE).marks.tolist() == [0] * 80


@pytest.mark.parametrize("indices,mark,error,match", [
    ([80], EXCLUDE, ValueError, "0..79"), ([-1], EXCLUDE, ValueError, "0..79"),
    ([1], 3, ValueError, "mark must be at most 2"), ([1], 1.0, TypeError, "mark"),
    ([True], EXCLUDE, TypeError, "integers"), ([1.5], EXCLUDE, TypeError, "integers"),
    ("12", EXCLUDE, TypeError, "integers")])
def test_set_marks_validation(model, indices, mark, error, match):
    with pytest.raises(error, match=match):
        set_marks(model, indices, mark)


def test_marks_survive_save_and_load(model, tmp_path):
    from modescope.core.output.model_file import load_model, save_model
    marked = set_marks(set_marks(model, [1, 2], KEEP), [7, 33], EXCLUDE)
    loaded = load_model(save_model(tmp_path / "m.npz", marked))
    assert loaded.marks.dtype == np.int8
    np.testing.assert_array_equal(loaded.marks, marked.marks)
    assert excluded_indices(loaded).tolist() == [7, 33]


# ----- lists and exports ---------------------------------------------------------------------

def test_flagged_indices_and_rows(model):
    table = score_table(model, rank=3)
    flagged = flagged_indices(table)
    assert {7, 33} <= set(flagged.tolist())
    assert flagged.tolist() == [i for i in table.order if table.flag[i]]
    rows = table_rows(model, table, "flagged")
    assert [r["index"] for r in rows] == flagged.tolist()
    assert [r["number"] for r in rows] == [i + 1 for i in flagged.tolist()]
    assert all(r["flag"] for r in rows)
    assert len(table_rows(model, table, "all")) == 80


def test_csv_of_all_images_parses_and_matches_table(model, tmp_path):
    marked = set_marks(model, [33], EXCLUDE)
    table = score_table(marked, rank=3)
    path = write_csv(tmp_path / "all.csv", marked, table, "all")
    rows = _read_csv(path)
    assert tuple(rows[0]) == CSV_COLUMNS == ("number", "path", "page", "score", "q", "q_limit",
                                             "t2", "t2_limit", "flag", "mark", "method")
    body = rows[1:]
    assert len(body) == 80
    for row, i in zip(body, table.order):
        assert int(row[0]) == i + 1                  # 1-based image number: column + 1
        assert row[1] == marked.paths[i]
        assert int(row[2]) == 0
        # floats are written so they read back exactly
        assert float(row[3]) == table.score[i]
        assert float(row[4]) == table.q[i]
        assert float(row[5]) == table.limits.q_limit
        assert float(row[6]) == table.t2[i]
        assert float(row[7]) == table.limits.t2_limit
        assert int(row[8]) == int(table.flag[i])
        assert int(row[9]) == int(marked.marks[i])
        assert row[10] == table.limits.q_method     # how the Q limit was computed
    assert sorted(int(row[0]) for row in body) == list(range(1, 81))
    # the method named is the one q_limit chose: the model keeps 10 of its modes, so the
    # tail beyond them is estimated (core.review.qlimit)
    assert {row[10] for row in body} == {"jackson-mudholkar-estimated-tail"}
    assert _no_temp_files(tmp_path)


def test_csv_of_flagged_and_excluded(model, tmp_path):
    marked = set_marks(model, [2, 7], EXCLUDE)
    table = score_table(marked, rank=3)
    flagged = _read_csv(write_csv(tmp_path / "flagged.csv", marked, table))[1:]
    assert [r[1] for r in flagged] == [marked.paths[i] for i in flagged_indices(table)]
    assert [int(r[0]) for r in flagged] == [i + 1 for i in flagged_indices(table)]
    excluded = _read_csv(write_csv(tmp_path / "excluded.csv", marked, table, "excluded"))[1:]
    # most unusual first: 7 is an outlier, 2 is not
    assert [r[1] for r in excluded] == [marked.paths[7], marked.paths[2]]
    assert [r[0] for r in excluded] == ["8", "3"]
    assert [r[9] for r in excluded] == ["2", "2"]


def test_exports_never_overwrite_unless_asked(model, tmp_path):
    table = score_table(model, rank=3)
    target = tmp_path / "out.csv"
    target.write_text("keep me", encoding="utf-8")
    with pytest.raises(DestinationError, match="already exists"):
        write_csv(target, model, table, "all")
    assert target.read_text(encoding="utf-8") == "keep me"
    with pytest.raises(DestinationError, match="already exists"):
        write_path_list(target, set_marks(model, [1], EXCLUDE))
    assert target.read_text(encoding="utf-8") == "keep me"
    write_csv(target, model, table, "all", overwrite=True)
    assert len(_read_csv(target)) == 81
    assert issubclass(DestinationError, ModescopeError)
    with pytest.raises(DestinationError, match="does not exist"):
        write_csv(tmp_path / "missing" / "x.csv", model, table)
    assert _no_temp_files(tmp_path)


def test_failed_write_leaves_no_file(model, tmp_path, monkeypatch):
    table = score_table(model, rank=3)

    def broken_replace(src, dst):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(atomic.os, "replace", broken_replace)
    with pytest.raises(DestinationError, match="full"):
        write_csv(tmp_path / "x.csv", model, table, "all")
    assert os.listdir(tmp_path) == []


def test_path_list_of_excluded_images(tmp_path):
    rng = np.random.default_rng(1)
    paths = ["/a/1.png", "/a/stack.tif", "/a/stack.tif", "/a/stack.tif", "/a/2.png"]
    d = make_decomposition(rng.random((16, 5)), 3, paths=paths, pages=[0, 0, 1, 2, 0])
    d = set_marks(d, [1, 3, 4], EXCLUDE)
    out = write_path_list(tmp_path / "excluded.txt", d)
    # a multi-page file is listed once; one path per line, newline after each
    assert out.read_text(encoding="utf-8") == "/a/stack.tif\n/a/2.png\n"
    table = score_table(d, rank=1)
    out = write_path_list(tmp_path / "flagged.txt", d, "flagged", table)
    expected = list(dict.fromkeys(paths[i] for i in flagged_indices(table)))
    assert out.read_text(encoding="utf-8").splitlines() == expected
    with pytest.raises(ValueError, match="needs an outlier table"):
        write_path_list(tmp_path / "f2.txt", d, "flagged")
    with pytest.raises(ValueError, match="which must be one of"):
        write_path_list(tmp_path / "f3.txt", d, "everything")


def test_exports_reject_a_table_of_another_decomposition(model, tmp_path):
    other = make_decomposition(np.random.default_rng(2).random((64, 20)), 4,
                               image_shape=(8, 8, 1))
    with pytest.raises(ValueError, match="table scores 20 images"):
        write_csv(tmp_path / "x.csv", model, score_table(other, rank=2))
    with pytest.raises(TypeError, match="OutlierTable"):
        write_csv(tmp_path / "x.csv", model, "table")
    with pytest.raises(TypeError, match="path"):
        write_csv(42, model, score_table(model, rank=2))


# ----- refit ---------------------------------------------------------------------------------

def _write_gray_pngs(folder, n, seed=0):
    """Small gray PNG images of our own (low rank plus noise), one bright outlier."""
    rng = np.random.default_rng(seed)
    r, c = np.mgrid[0:24, 0:32]
    patterns = np.stack([np.sin(r / 4.0), np.cos(c / 5.0)])
    paths = []
    for i in range(n):
        img = 120 + 40 * np.tensordot(rng.standard_normal(2), patterns, 1)
        img += 4 * rng.standard_normal(img.shape)
        if i == n // 2:
            img += 90
        path = folder / f"img_{i:02d}.png"
        Image.fromarray(np.clip(img, 0, 255).astype(np.uint8)).save(path)
        paths.append(path)
    return paths


def _snapshot(paths):
    return {str(p): (os.path.getmtime(p), p.read_bytes()) for p in paths}


def test_refit_without_excluded_equals_analysis_of_remaining_files(tmp_path):
    from modescope.core.engine import pipeline
    files = _write_gray_pngs(tmp_path, 30)
    before = _snapshot(files)
    options = pipeline.AnalysisOptions(rank=5, block_size=8)
    d = pipeline.analyze([tmp_path], options).decomposition
    table = score_table(d, rank=2)
    assert table.order[0] == 15
    marked = set_marks(d, [15, 3], EXCLUDE)
    calls = []
    result = refit_without_excluded(marked, progress=calls.append)
    assert calls and not result.cancelled
    remaining = [str(p) for i, p in enumerate(files) if i not in (3, 15)]
    reference = pipeline.analyze(remaining, options).decomposition
    refit = result.decomposition
    assert refit.paths == reference.paths == tuple(remaining)
    assert refit.rank == 5   # options rebuilt from the model's metadata
    np.testing.assert_allclose(refit.singular_values, reference.singular_values, rtol=1e-6)
    np.testing.assert_allclose(refit.weights, reference.weights, rtol=1e-5, atol=1e-6)
    assert refit.n_images == 28
    assert _snapshot(files) == before     # sources never touched
    # explicit options win over the stored ones
    other = refit_without_excluded(marked, pipeline.AnalysisOptions(rank=3, block_size=8))
    assert other.decomposition.rank == 3


def test_refit_excluding_one_page_of_a_multi_page_file(tmp_path):
    from modescope.core.engine import pipeline
    rng = np.random.default_rng(3)
    r, c = np.mgrid[0:24, 0:32]
    frames = [np.clip(100 + 50 * np.sin(r / (3.0 + i)) + 5 * rng.standard_normal(r.shape),
                      0, 255).astype(np.uint8) for i in range(8)]
    stack = tmp_path / "stack.tif"
    pages = [Image.fromarray(f) for f in frames[:3]]
    pages[0].save(stack, save_all=True, append_images=pages[1:])
    singles = []
    for i in range(3, 8):
        singles.append(tmp_path / f"single_{i}.png")
        Image.fromarray(frames[i]).save(singles[-1])
    options = pipeline.AnalysisOptions(rank=3, block_size=4)
    d = pipeline.analyze([str(stack)] + [str(p) for p in singles], options).decomposition
    assert d.pages.tolist()[:3] == [0, 1, 2]
    marked = set_marks(d, [1, 4], EXCLUDE)   # page 1 of the stack and one single file
    assert remaining_sources(marked)[:2] == [(str(stack), 0), (str(stack), 2)]
    refit = refit_without_excluded(marked).decomposition
    assert list(zip(refit.paths, refit.pages.tolist())) == remaining_sources(marked)
    # reference: the same pixels as separate files (pages 0 and 2 of the stack, 4 singles)
    ref_dir = tmp_path / "ref"
    ref_dir.mkdir()
    ref_files = []
    for j, f in enumerate([frames[0], frames[2]] + [frames[i] for i in (3, 5, 6, 7)]):
        ref_files.append(str(ref_dir / f"r{j}.png"))
        Image.fromarray(f).save(ref_files[-1])
    reference = pipeline.analyze(ref_files, options).decomposition
    np.testing.assert_allclose(refit.singular_values, reference.singular_values, rtol=1e-5)


def test_refit_refuses_when_everything_is_excluded(model):
    with pytest.raises(NoUsableImagesError, match="all 80 images are marked excluded"):
        refit_without_excluded(set_marks(model, range(80), EXCLUDE))
    with pytest.raises(ValueError, match="no source paths"):
        remaining_sources(model.replace(paths=()))
    with pytest.raises(TypeError, match="options must be AnalysisOptions"):
        refit_without_excluded(model, options={"rank": 3})


def test_lists_never_replace_a_source_of_the_analysis(tmp_path):
    # the CSV and the path list refuse a destination that is one of the analysis' own source
    # files, even with overwrite=True; the source stays byte-identical
    import hashlib

    from modescope.core.output.atomic import DestinationError
    from modescope.core.review.outliers import score_table

    source = tmp_path / "frame_0.png"
    source.write_bytes(b"\x89PNG not really, but a source file")
    rng = np.random.default_rng(1)
    X = rng.random((6, 8))
    mean = X.mean(axis=1)
    u, s, vt = np.linalg.svd(X - mean[:, None], full_matrices=False)
    d = Decomposition(mean=mean.astype(np.float32), basis=u[:, :2].astype(np.float32),
                      singular_values=s[:2], weights=s[:2, None] * vt[:2],
                      total_energy=float(np.sum(s ** 2)), image_shape=(6, 1, 1),
                      paths=tuple([str(source)] + [str(tmp_path / f"f{i}.png") for i in
                                                   range(1, 8)]),
                      residual=np.sum((s[2:, None] * vt[2:]) ** 2, axis=0), exact=True)
    before = hashlib.sha256(source.read_bytes()).hexdigest()
    table = score_table(d, rank=1)
    with pytest.raises(DestinationError, match="frame_0.png"):
        write_csv(source, d, table, "all", overwrite=True)
    d = set_marks(d, [0], EXCLUDE)
    with pytest.raises(DestinationError, match="frame_0.png"):
        write_path_list(source, d, "excluded", overwrite=True)
    assert hashlib.sha256(source.read_bytes()).hexdigest() == before
