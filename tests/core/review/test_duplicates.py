"""Tests of modescope.core.review.duplicates and of the ``modescope duplicates`` command.

References: numpy's LAPACK SVD for the fixtures, a brute-force pairwise distance with
scipy.spatial.distance.pdist and connected components with scipy.sparse.csgraph for the
expected groups.
"""

from __future__ import annotations

import argparse

import numpy as np
import pytest
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial.distance import pdist, squareform

from modescope.app.cli import duplicates as cli_duplicates
from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.errors import ModescopeError
from modescope.core.review.duplicates import (DuplicateReport, find_duplicates, pair_bounds,
                                             pair_distance)


def make_decomposition(X, K, image_shape=None, paths=None) -> Decomposition:
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
                         paths=tuple(paths) if paths else (), residual=residual, exact=True)


def collection_with_copies(seed=0, n=60, pixels=144):
    """Distinct random images (low rank plus noise) with planted exact and near copies."""
    rng = np.random.default_rng(seed)
    X = 0.5 + 0.2 * rng.standard_normal((pixels, 5)) @ rng.standard_normal((5, n)) / 3
    X += 0.05 * rng.standard_normal((pixels, n))
    exact = X[:, [5, 5]]                                       # columns n, n+1: copies of 5
    near = X[:, [10]] + 1e-4 * rng.standard_normal((pixels, 1))  # column n+2: near copy of 10
    return np.hstack([X, exact, near]), {(5, n, n + 1), (10, n + 2)}


def reader(X):
    """The images as columns of X (what the analysis decoded), for ``read_image``."""
    return lambda i: X[:, i]


def brute_force_groups(X, threshold):
    """Groups of images within ``threshold`` of each other in the centred space (scipy)."""
    C = X - X.mean(axis=1, keepdims=True)
    dist = squareform(pdist(C.T))
    i, j = np.nonzero(np.triu(dist <= threshold, 1))
    n = X.shape[1]
    graph = coo_matrix((np.ones(i.size), (i, j)), shape=(n, n))
    _, labels = connected_components(graph, directed=False)
    groups = {}
    for idx, lab in enumerate(labels):
        groups.setdefault(lab, []).append(idx)
    return {tuple(g) for g in groups.values() if len(g) > 1}, dist


def test_finds_planted_exact_and_near_copies_only():
    X, planted = collection_with_copies()
    d = make_decomposition(X, 8, paths=[f"/c/{i}.png" for i in range(X.shape[1])])
    assert find_duplicates(d, tolerance=0.02).groups == ()   # residuals: bounds straddle
    report = find_duplicates(d, tolerance=0.02, read_image=reader(X))
    assert isinstance(report, DuplicateReport)
    assert {g.indices for g in report.groups} == planted
    assert [g.size for g in report.groups] == [3, 2]            # sorted by size
    assert report.groups[0].paths == ("/c/5.png", "/c/60.png", "/c/61.png")
    assert report.n_duplicates == 5
    assert report.rms_norm == pytest.approx(np.sqrt(d.total_energy / d.n_images))
    assert report.threshold == pytest.approx(0.02 * report.rms_norm)


def test_groups_are_cliques_within_the_tolerance_on_a_complete_model():
    # With every mode kept the residuals are 0, so both bounds are the true distance (scipy
    # pdist): every pair of every group is within the limit, no image is in two groups, and
    # each reported distance to the first image is the true one.
    X, planted = collection_with_copies(seed=1)
    d = make_decomposition(X, X.shape[1])
    _, dist = brute_force_groups(X, 0.0)
    for tolerance in (0.0, 0.02, 0.5, 0.8, 1.0):
        report = find_duplicates(d, tolerance=tolerance)
        limit = report.threshold + 1e-6 * report.rms_norm
        seen = [i for g in report.groups for i in g.indices]
        assert len(seen) == len(set(seen)), tolerance
        for g in report.groups:
            sub = dist[np.ix_(g.indices, g.indices)]
            assert sub.max() <= limit * (1 + 1e-9), tolerance
            assert g.max_distance == pytest.approx(sub.max(), rel=1e-6, abs=1e-9)
            assert g.max_distance_fraction == pytest.approx(g.max_distance / report.rms_norm)
            assert g.distances[0] == 0.0
            assert np.allclose(g.distances, dist[g.indices[0], list(g.indices)],
                               rtol=1e-6, atol=1e-9)
        if 0 < tolerance <= 0.02:
            assert {g.indices for g in report.groups} == planted, tolerance


def test_tolerance_zero_finds_exact_copies_only():
    X, _ = collection_with_copies(seed=2)
    d = make_decomposition(X, 8)
    report = find_duplicates(d, tolerance=0.0, read_image=reader(X))
    assert [g.indices for g in report.groups] == [(5, 60, 61)]
    assert report.groups[0].max_distance == pytest.approx(0.0, abs=1e-6 * report.rms_norm)


def test_bounds_enclose_the_true_distance_on_a_truncated_model():
    X, _ = collection_with_copies(seed=3)
    d = make_decomposition(X, 4)
    C = X - X.mean(axis=1, keepdims=True)
    rng = np.random.default_rng(0)
    for i, j in rng.integers(0, X.shape[1], size=(50, 2)):
        true = np.linalg.norm(C[:, i] - C[:, j])   # numpy
        assert pair_distance(d, int(i), int(j)) <= true * (1 + 1e-9) + 1e-12
        lower, upper = pair_bounds(d, int(i), int(j))
        assert lower <= true * (1 + 1e-9) + 1e-12 <= upper * (1 + 2e-9) + 2e-12
    assert pair_distance(d, 10, 62) == pytest.approx(0.0, abs=3e-3)


def test_search_rank_does_not_change_the_result():
    X, planted = collection_with_copies(seed=4)
    d = make_decomposition(X, 10)
    reports = [find_duplicates(d, tolerance=0.05, rank=r, read_image=reader(X))
               for r in (0, 1, 3, 10)]
    for report in reports:
        assert {g.indices for g in report.groups} == planted
    assert reports[0].n_candidates >= reports[-1].n_candidates
    assert [r.rank for r in reports] == [0, 1, 3, 10]


def test_equal_weights_and_residual_norms_are_not_grouped_when_images_differ():
    # Residuals are known by norm only: images 0 and 1 have equal weights and equal residual
    # norms but residuals along e2 and e3 (true distance sqrt(2)). Their bounds straddle the
    # limit, so without the pixels the pair is left out; read on the pixels it is refused.
    pixels = 4
    basis = np.eye(pixels, 1, dtype=np.float32)
    weights = np.array([[1.0, 1.0, -2.0]])
    residual = np.array([1.0, 1.0, 0.0])
    d = Decomposition(mean=np.zeros(pixels, np.float32), basis=basis,
                      singular_values=np.array([np.sqrt(6.0)]), weights=weights,
                      total_energy=8.0, image_shape=(2, 2, 1), residual=residual, exact=True)
    report = find_duplicates(d, tolerance=0.01)
    assert report.groups == () and report.n_unsure == 1 and report.n_pairs == 0
    assert pair_distance(d, 0, 1) == 0.0
    assert pair_bounds(d, 0, 1) == (0.0, 2.0)
    images = {0: [1.0, 0.0, 1.0, 0.0], 1: [1.0, 0.0, 0.0, 1.0], 2: [-2.0, 0.0, 0.0, 0.0]}
    read = find_duplicates(d, tolerance=0.01, read_image=lambda i: np.array(images[i]))
    assert read.groups == () and read.n_measured == 1 and read.n_unsure == 0
    # the same pair with equal residual vectors (an exact copy) is confirmed on the pixels
    images[1] = images[0]
    copy = find_duplicates(d, tolerance=0.0, read_image=lambda i: np.array(images[i]))
    assert [g.indices for g in copy.groups] == [(0, 1)]
    assert copy.groups[0].distances == (0.0, 0.0)


def test_unreadable_images_leave_their_pairs_out():
    pixels = 4
    d = Decomposition(mean=np.zeros(pixels, np.float32), basis=np.eye(pixels, 1, dtype=np.float32),
                      singular_values=np.array([1.0]), weights=np.array([[1.0, 1.0]]),
                      total_energy=2.0, image_shape=(2, 2, 1), residual=np.array([1.0, 1.0]),
                      exact=True)

    def read(i):
        raise ModescopeError(f"image {i}: the source file is missing")
    report = find_duplicates(d, tolerance=0.01, read_image=read)
    assert report.groups == () and report.unreadable == (0, 1) and report.n_unsure == 1
    with pytest.raises(TypeError, match="read_image must be a callable"):
        find_duplicates(d, read_image=3)


def test_no_chaining_on_a_line_of_images():
    # Points on a line 1.0 apart and a distance limit of 1.01: neighbours are within it but
    # images two apart are not, so groups are pairs, never a chain (numpy distances).
    n = 6
    X = np.zeros((2, n))
    X[0] = np.arange(n) * 1.0
    d = make_decomposition(X, 2)
    rms = np.sqrt(d.total_energy / n)
    report = find_duplicates(d, tolerance=1.01 / rms)
    assert [g.indices for g in report.groups] == [(0, 1), (2, 3), (4, 5)]
    assert all(g.max_distance == pytest.approx(1.0) for g in report.groups)


def test_greedy_clique_starts_from_the_closest_pair():
    # 0-1 are 0.5 apart, 1-2 0.9, 0-2 1.4 (over the limit 1.0): the group is the closest pair
    # (0, 1); image 2 is alone (its only neighbour is taken).
    X = np.array([[0.0, 0.5, 1.4, 10.0, 20.0]])
    d = make_decomposition(X, 1)
    rms = np.sqrt(d.total_energy / X.shape[1])
    report = find_duplicates(d, tolerance=1.0 / rms)
    assert [g.indices for g in report.groups] == [(0, 1)]
    assert report.groups[0].distances == pytest.approx((0.0, 0.5))


def test_identical_collection_is_one_group():
    X = np.tile(np.random.default_rng(5).random((9, 1)), (1, 5))
    d = make_decomposition(X, 3)
    report = find_duplicates(d, tolerance=0.0)
    assert [g.indices for g in report.groups] == [(0, 1, 2, 3, 4)]
    assert report.groups[0].max_distance_fraction == pytest.approx(0.0, abs=1e-12)


def test_validation():
    X, _ = collection_with_copies()
    d = make_decomposition(X, 5)
    with pytest.raises(ValueError, match="tolerance must be >= 0"):
        find_duplicates(d, tolerance=-0.1)
    with pytest.raises(ValueError, match="finite"):
        find_duplicates(d, tolerance=float("inf"))
    with pytest.raises(TypeError, match="tolerance must be a number"):
        find_duplicates(d, tolerance="0.1")
    with pytest.raises(ValueError, match="rank must be at most 5"):
        find_duplicates(d, rank=6)
    with pytest.raises(ValueError, match="no residuals"):
        find_duplicates(d.replace(residual=None))
    with pytest.raises(TypeError, match="Decomposition"):
        find_duplicates(X)


# ----- command line --------------------------------------------------------------------------

def _parser():
    parser = argparse.ArgumentParser(prog="modescope")
    cli_duplicates.register(parser.add_subparsers(dest="command"))
    return parser


def test_cli_duplicates_prints_groups(monkeypatch, capsys):
    X, planted = collection_with_copies()
    d = make_decomposition(X, 8, paths=[f"/c/{i}.png" for i in range(X.shape[1])])
    monkeypatch.setattr(cli_duplicates, "load_model", lambda path: d)
    monkeypatch.setattr(cli_duplicates, "load_analysis_image", lambda dec, i: X[:, i])
    args = _parser().parse_args(["duplicates", "m.npz", "--tolerance", "0.02"])
    assert cli_duplicates.run(args) == 0
    out = capsys.readouterr().out
    assert "2 groups, 5 images" in out
    assert "group 1: 3 images" in out and "group 2: 2 images" in out
    lines = out.splitlines()
    for i in (5, 60, 61, 10, 62):         # printed numbers are 1-based
        assert any(line.split()[:1] == [str(i + 1)] and line.endswith(f"/c/{i}.png")
                   for line in lines), i
    assert out.rstrip().endswith(cli_duplicates.CAUTION)
    # without the pixels the truncated model cannot confirm the copies: said, not guessed
    args = _parser().parse_args(["duplicates", "m.npz", "--tolerance", "0.02", "--bounds-only"])
    assert cli_duplicates.run(args) == 0
    out = capsys.readouterr().out
    assert "No near-duplicate groups found." in out and "left out" in out


def test_cli_duplicates_csv(monkeypatch, tmp_path, capsys):
    import csv as csv_module
    X, planted = collection_with_copies()
    src = tmp_path / "5.png"
    src.write_bytes(b"not really a png")
    paths = [str(src) if i == 5 else f"/c/{i}.png" for i in range(X.shape[1])]
    d = make_decomposition(X, 8, paths=paths)
    monkeypatch.setattr(cli_duplicates, "load_model", lambda path: d)
    monkeypatch.setattr(cli_duplicates, "load_analysis_image", lambda dec, i: X[:, i])
    out_csv = tmp_path / "groups.csv"
    argv = ["duplicates", "m.npz", "--tolerance", "0.02", "--csv", str(out_csv)]
    assert cli_duplicates.run(_parser().parse_args(argv)) == 0
    assert f"CSV written: {out_csv}" in capsys.readouterr().out
    with open(out_csv, newline="", encoding="utf-8") as fh:
        rows = list(csv_module.reader(fh))
    assert rows[0] == ["group", "number", "path", "distance"]
    assert [(r[0], r[1]) for r in rows[1:]] == [("1", "6"), ("1", "61"), ("1", "62"),
                                               ("2", "11"), ("2", "63")]
    assert rows[1][2] == str(src) and rows[4][2] == "/c/10.png"
    C = X - X.mean(axis=1, keepdims=True)
    assert float(rows[1][3]) == 0.0
    assert float(rows[5][3]) == pytest.approx(np.linalg.norm(C[:, 62] - C[:, 10]), rel=1e-9)
    # an existing file needs --overwrite; a source image is never replaced
    assert cli_duplicates.run(_parser().parse_args(argv)) == 1
    assert "already exists" in capsys.readouterr().err
    argv_src = ["duplicates", "m.npz", "--csv", str(src), "--overwrite"]
    assert cli_duplicates.run(_parser().parse_args(argv_src)) == 1
    assert src.read_bytes() == b"not really a png"


def test_cli_duplicates_no_groups_and_errors(monkeypatch, capsys):
    rng = np.random.default_rng(0)
    d = make_decomposition(rng.random((30, 20)), 5)
    monkeypatch.setattr(cli_duplicates, "load_model", lambda path: d)
    assert cli_duplicates.run(_parser().parse_args(["duplicates", "m.npz"])) == 0
    assert "No near-duplicate groups found." in capsys.readouterr().out
    assert cli_duplicates.run(_parser().parse_args(["duplicates", "m.npz", "--rank", "9"])) == 2
    assert "--rank must be at most 5" in capsys.readouterr().err
    with pytest.raises(SystemExit) as info:
        _parser().parse_args(["duplicates", "m.npz", "--tolerance", "-1"])
    assert info.value.code == 2
    monkeypatch.setattr(cli_duplicates, "load_model", lambda path: d.replace(residual=None))
    assert cli_duplicates.run(_parser().parse_args(["duplicates", "m.npz"])) == 1
    assert "no residuals" in capsys.readouterr().err


def test_cli_duplicates_through_saved_model(tmp_path, capsys):
    from modescope.app.cli.main import main
    from modescope.core.output.model_file import save_model
    X, planted = collection_with_copies(seed=6)
    # every mode kept: no residual, so the bounds decide and no source file is read
    d = make_decomposition(X, X.shape[1], paths=[f"/c/{i}.png" for i in range(X.shape[1])])
    model = save_model(tmp_path / "m.npz", d)
    assert main(["duplicates", str(model), "--tolerance", "0.02"]) == 0
    out = capsys.readouterr().out
    assert "2 groups, 5 images" in out
