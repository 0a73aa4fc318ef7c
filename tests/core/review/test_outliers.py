"""Tests of modescope.core.review.outliers (Q, T^2, control limits, combined ranking) and of the
``modescope outliers`` command.

References used beside the checks: the published limit formulas (Jackson & Mudholkar 1979;
Box 1954; Tracy, Young & Mason 1992; the F form for new observations) evaluated here with
scipy.stats quantiles; Monte Carlo draws of the exact weighted chi-square distribution;
numpy's LAPACK SVD; scikit-learn's PCA; scikit-learn's bundled digits.
"""

from __future__ import annotations

import argparse
import csv
import math

import numpy as np
import pytest
from scipy import stats

from modescope.app.cli import outliers as cli_outliers
from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.review.outliers import (
    ControlLimits, OutlierTable, discarded_eigenvalues_known, eigenvalues, hotelling_t2,
    q_limit_box, q_limit_jackson_mudholkar, score_new, score_table, t2_limit_beta, t2_limit_f)


# ----- fixtures ----------------------------------------------------------------------------

def make_decomposition(X, K, image_shape=None, paths=None) -> Decomposition:
    """Exact mean-centred SVD of the columns of X (numpy LAPACK), keeping K modes."""
    X = np.asarray(X, dtype=np.float64)
    n = X.shape[1]
    mean = X.mean(axis=1)
    C = X - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U[:, :K], s[:K, None] * Vt[:K])
    residual = np.sum((C - basis @ weights) ** 2, axis=0)
    shape = image_shape or (X.shape[0], 1, 1)
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:K].copy(), weights=weights,
                         total_energy=float(np.sum(C ** 2)), image_shape=shape,
                         paths=tuple(paths) if paths else (), residual=residual, exact=True)


def gaussian_data(seed, p=30, n=2000):
    """n samples of a 30-dimensional Gaussian with 3 strong directions and a decaying tail."""
    rng = np.random.default_rng(seed)
    sd = np.r_[[8.0, 5.0, 3.0], np.linspace(1.0, 0.3, p - 3)]
    rot, _ = np.linalg.qr(rng.standard_normal((p, p)))
    def draw(m):
        return rot @ (sd[:, None] * rng.standard_normal((p, m))) + 2.0
    return draw


def jm_paper(lam, level):
    """Jackson & Mudholkar (1979), eq. for Q_alpha, written from the paper's form."""
    theta1, theta2, theta3 = (float(np.sum(lam ** i)) for i in (1, 2, 3))
    h0 = 1 - 2 * theta1 * theta3 / (3 * theta2 ** 2)
    c_alpha = stats.norm.ppf(level)
    return theta1 * (c_alpha * np.sqrt(2 * theta2 * h0 ** 2) / theta1 + 1
                     + theta2 * h0 * (h0 - 1) / theta1 ** 2) ** (1 / h0), h0


def binomial_band(p, n, sds=4.0):
    """p +- 4 binomial standard deviations: the tolerance of the false-alarm checks."""
    sd = math.sqrt(p * (1 - p) / n)
    return p - sds * sd, p + sds * sd


# ----- control limits against the published formulas ---------------------------------------

@pytest.mark.parametrize("lam", [np.array([1.0]), np.array([5.0, 3.0, 1.0, 0.5]),
                                 np.linspace(1.0, 0.01, 50), np.full(10, 2.0)])
@pytest.mark.parametrize("level", [0.95, 0.99, 0.999])
def test_jackson_mudholkar_matches_paper_formula(lam, level):
    expected, h0 = jm_paper(lam, level)
    assert h0 > 0
    # Jackson & Mudholkar (1979) with scipy.stats.norm quantile
    assert q_limit_jackson_mudholkar(lam, level) == pytest.approx(expected, rel=1e-12)


def test_jackson_mudholkar_ignores_zero_eigenvalues_and_is_zero_without_variance():
    lam = np.array([4.0, 2.0, 1.0])
    assert q_limit_jackson_mudholkar(np.r_[lam, 0.0, 0.0], 0.99) == pytest.approx(
        jm_paper(lam, 0.99)[0], rel=1e-12)
    assert q_limit_jackson_mudholkar([0.0, 0.0], 0.99) == 0.0
    assert q_limit_jackson_mudholkar([], 0.99) == 0.0


@pytest.mark.parametrize("lam", [np.linspace(1.0, 0.01, 50), np.array([5.0, 3.0, 1.0, 0.5]),
                                 1.0 / np.arange(10, 1000)])
def test_q_limit_against_monte_carlo_weighted_chi_square(lam):
    # Q of Gaussian data is sum_j lambda_j z_j**2 exactly; 100,000 numpy draws give its 99 %
    # point to about 1 %. JM (or Box when h0 <= 0) must be within 6 % of it.
    rng = np.random.default_rng(11)
    draws = np.zeros(100_000)
    for part in np.array_split(lam, max(1, lam.size // 50)):
        draws += rng.standard_normal((draws.size, part.size)) ** 2 @ part
    reference = np.quantile(draws, 0.99)
    assert q_limit_jackson_mudholkar(lam, 0.99) == pytest.approx(reference, rel=0.06)


def test_negative_h0_falls_back_to_box_with_exact_moments():
    lam = 1.0 / np.arange(10, 1000)
    assert jm_paper(lam, 0.99)[1] < 0
    theta1, theta2 = lam.sum(), (lam ** 2).sum()
    # Box (1954): g = var/(2 mean), h = 2 mean**2/var with mean theta1 and variance 2 theta2
    expected = theta2 / theta1 * stats.chi2.ppf(0.99, theta1 ** 2 / theta2)
    assert q_limit_jackson_mudholkar(lam, 0.99) == pytest.approx(expected, rel=1e-12)


def test_box_limit_matches_formula():
    q = np.random.default_rng(3).gamma(2.0, 1.5, size=500)
    m, v = q.mean(), q.var(ddof=1)
    g, h = v / (2 * m), 2 * m * m / v
    # Box (1954) moment-matched chi-square, scipy.stats.chi2 quantile
    assert q_limit_box(q, 0.99) == pytest.approx(g * stats.chi2.ppf(0.99, h), rel=1e-12)
    assert q_limit_box(q, 0.9) < q_limit_box(q, 0.99)


def test_box_limit_degenerate_cases():
    assert q_limit_box(np.full(10, 2.5), 0.99) == pytest.approx(2.5)
    assert q_limit_box(np.zeros(10), 0.99) == 0.0
    with pytest.raises(ValueError, match="at least 2"):
        q_limit_box([1.0], 0.99)
    with pytest.raises(ValueError, match="finite"):
        q_limit_box([1.0, np.nan], 0.99)


@pytest.mark.parametrize("n,k", [(20, 1), (50, 3), (2000, 10), (12, 10)])
@pytest.mark.parametrize("level", [0.95, 0.99])
def test_t2_limits_match_formulas(n, k, level):
    # Tracy, Young & Mason (1992), scipy.stats.beta quantile
    assert t2_limit_beta(n, k, level) == pytest.approx(
        (n - 1) ** 2 / n * stats.beta.ppf(level, k / 2, (n - k - 1) / 2), rel=1e-12)
    # F form for new observations, scipy.stats.f quantile
    assert t2_limit_f(n, k, level) == pytest.approx(
        k * (n - 1) * (n + 1) / (n * (n - k)) * stats.f.ppf(level, k, n - k), rel=1e-12)


def test_t2_f_limit_tends_to_chi_square_for_large_n():
    # With n -> infinity both forms tend to chi2(k) (scipy.stats.chi2)
    assert t2_limit_f(10 ** 7, 4, 0.99) == pytest.approx(stats.chi2.ppf(0.99, 4), rel=1e-4)
    assert t2_limit_beta(10 ** 7, 4, 0.99) == pytest.approx(stats.chi2.ppf(0.99, 4), rel=1e-4)


@pytest.mark.parametrize("call", [
    lambda: t2_limit_beta(10, 9, 0.99), lambda: t2_limit_beta(10, 0, 0.99),
    lambda: t2_limit_f(10, 10, 0.99), lambda: t2_limit_f(10, 3, 1.0),
    lambda: q_limit_jackson_mudholkar([1.0, -1.0], 0.99),
    lambda: q_limit_jackson_mudholkar([1.0], 0.0)])
def test_limit_functions_reject_bad_values(call):
    with pytest.raises(ValueError):
        call()


def test_limit_functions_reject_bad_types():
    with pytest.raises(TypeError, match="n must be an integer"):
        t2_limit_beta(10.0, 2, 0.99)
    with pytest.raises(TypeError, match="level must be a number"):
        t2_limit_f(10, 2, "0.99")
    with pytest.raises(TypeError, match="discarded_eigenvalues"):
        q_limit_jackson_mudholkar("abc", 0.99)


# ----- T^2 -----------------------------------------------------------------------------------

def test_hotelling_t2_matches_scikit_learn_pca():
    from sklearn.decomposition import PCA
    draw = gaussian_data(5, p=30, n=400)
    X = draw(400)
    d = make_decomposition(X, 30)
    table = score_table(d, rank=6)
    pca = PCA(n_components=6, svd_solver="full").fit(X.T)
    scores = pca.transform(X.T)
    # scikit-learn PCA: T2 = sum(scores**2 / explained_variance_)
    reference = np.sum(scores ** 2 / pca.explained_variance_, axis=1)
    np.testing.assert_allclose(table.t2, reference, rtol=1e-6)
    np.testing.assert_allclose(eigenvalues(d)[:6], pca.explained_variance_, rtol=1e-10)
    # the function on its own
    np.testing.assert_allclose(hotelling_t2(d.weights[:6], d.singular_values[:6], 400),
                               reference, rtol=1e-6)


def test_hotelling_t2_validates():
    with pytest.raises(ValueError, match="positive"):
        hotelling_t2(np.ones((2, 3)), [1.0, 0.0], 10)
    with pytest.raises(ValueError, match="2 rows"):
        hotelling_t2(np.ones((3, 3)), [1.0, 2.0], 10)
    assert hotelling_t2(np.ones((0, 4)), np.ones(0), 10).tolist() == [0, 0, 0, 0]


# ----- false alarms on Gaussian data ---------------------------------------------------------

@pytest.mark.parametrize("seed", [0, 1, 2])
def test_false_alarm_rate_near_one_percent_on_gaussian_data(seed):
    draw = gaussian_data(seed)
    X = draw(2000)
    low, high = binomial_band(0.01, 2000)   # 4 binomial standard deviations: 0.11 %..1.89 %
    full = make_decomposition(X, 30)        # every eigenvalue known
    assert discarded_eigenvalues_known(full)
    table = score_table(full, rank=3, level=0.99)
    assert table.limits.q_method == "jackson-mudholkar"
    assert table.limits.t2_method == "beta"
    assert low <= table.q_flag.mean() <= high
    assert low <= table.t2_flag.mean() <= high
    truncated = make_decomposition(X, 8)    # SVD truncated: modes 9..30 from the residuals
    assert not discarded_eigenvalues_known(truncated)
    table_t = score_table(truncated, rank=3, level=0.99)
    assert table_t.limits.q_method == "jackson-mudholkar-estimated-tail"
    assert low <= table_t.q_flag.mean() <= high
    np.testing.assert_allclose(table_t.t2, table.t2, rtol=1e-9)
    np.testing.assert_allclose(table_t.q, table.q, rtol=1e-9)


def test_false_alarm_rate_of_new_images_uses_f_form():
    draw = gaussian_data(4)
    X = draw(2000)
    d = make_decomposition(X, 30)
    new = draw(20000)
    centred = new - d.mean.astype(np.float64)[:, None]
    basis = d.basis.astype(np.float64)
    w = basis.T @ centred
    res = np.sum((centred - basis @ w) ** 2, axis=0)
    table = score_new(d, w, res, rank=3, level=0.99)
    assert table.limits.t2_method == "f"
    assert table.limits.t2_limit == pytest.approx(t2_limit_f(2000, 3, 0.99))
    low, high = binomial_band(0.01, 20000)
    assert low <= table.t2_flag.mean() <= high
    assert low <= table.q_flag.mean() <= high
    # Q of new images at rank 3 is the squared distance to the rank-3 subspace (numpy)
    basis3 = basis[:, :3]
    direct = np.sum((centred - basis3 @ (basis3.T @ centred)) ** 2, axis=0)
    np.testing.assert_allclose(table.q, direct, rtol=1e-6)


def test_score_new_of_model_images_matches_score_table_statistics():
    d = make_decomposition(gaussian_data(6, n=300)(300), 10)
    a = score_table(d, rank=4)
    b = score_new(d, d.weights, d.residual, rank=4)
    np.testing.assert_allclose(b.q, a.q, rtol=1e-12)
    np.testing.assert_allclose(b.t2, a.t2, rtol=1e-12)
    assert b.limits.q_limit == a.limits.q_limit
    assert b.limits.t2_limit > a.limits.t2_limit   # F form is wider than the Beta form


# ----- ranking -----------------------------------------------------------------------------

def test_combined_score_rule_and_order():
    d = make_decomposition(gaussian_data(7, n=500)(500), 12)
    t = score_table(d, rank=4, level=0.95)
    np.testing.assert_allclose(t.q, d.residual_at_rank(4))
    np.testing.assert_allclose(t.score, np.maximum(t.q / t.limits.q_limit,
                                                   t.t2 / t.limits.t2_limit))
    np.testing.assert_array_equal(t.flag, t.score > 1)
    np.testing.assert_array_equal(t.flag, t.q_flag | t.t2_flag)
    np.testing.assert_array_equal(t.q_flag, t.q > t.limits.q_limit)
    np.testing.assert_array_equal(t.t2_flag, t.t2 > t.limits.t2_limit)
    assert np.all(np.diff(t.score[t.order]) <= 0)
    assert sorted(t.order.tolist()) == list(range(500))
    assert t.flagged_indices().tolist() == [i for i in t.order if t.flag[i]]
    assert isinstance(t.limits, ControlLimits) and isinstance(t, OutlierTable)
    assert t.limits.level == 0.95 and t.limits.rank == 4 and t.limits.t2_rank == 4


def test_higher_level_flags_fewer_images():
    d = make_decomposition(gaussian_data(8, n=500)(500), 12)
    assert score_table(d, 4, 0.999).n_flagged <= score_table(d, 4, 0.95).n_flagged


def _synthetic_collection(n=200, rows=16, cols=16, seed=0):
    """Smooth low-rank gray images plus noise, with four planted anomalies."""
    rng = np.random.default_rng(seed)
    r, c = np.mgrid[0:rows, 0:cols] / max(rows, cols)
    patterns = np.stack([np.sin(2 * np.pi * r), np.cos(2 * np.pi * c), r * c]).reshape(3, -1)
    base = 0.5 + 0.1 * (rng.standard_normal((n, 3)) @ patterns).T
    X = base + 0.005 * rng.standard_normal(base.shape)
    planted = [17, 64, 121, 180]
    X[:, 17] += 0.8 * np.exp(-((r - 0.5) ** 2 + (c - 0.3) ** 2) / 0.03).ravel()   # blob
    X[:, 64] = np.clip(X[:, 64] + 0.45, 0, 1)                                      # over-exposed
    X[(r.ravel() * rows).astype(int) == 8, 121] = 1.0                              # scratch
    X[:, 180] = 0.5 + 0.9 * patterns[0] + 0.005 * rng.standard_normal(rows * cols)  # extreme mix
    return X, planted


def test_planted_anomalies_rank_first_in_synthetic_images():
    X, planted = _synthetic_collection()
    for K in (10, 200):   # truncated (tail from residuals) and complete (known eigenvalues)
        d = make_decomposition(X, K, image_shape=(16, 16, 1))
        table = score_table(d, rank=3)
        assert set(table.order[:4].tolist()) == set(planted)
        assert table.flag[planted].all()


def test_planted_problems_of_demo_collection_rank_first(tmp_path):
    from modescope.core import demo
    from modescope.core.engine import pipeline
    demo.write_collection(tmp_path, 120, size=(48, 64), fmt="png")
    planted = {p.index for p in demo.planted_problems(120)}
    assert len(planted) == 4
    d = pipeline.analyze([tmp_path], pipeline.AnalysisOptions(rank=10)).decomposition
    for k in (3, 5, 10):
        table = score_table(d, rank=k)
        assert set(table.order[:4].tolist()) == planted, k
        assert table.flag[list(planted)].all()


@pytest.mark.parametrize("K", [64, 20])
def test_digit_ones_rank_first_among_zeros(K):
    # scikit-learn's bundled digits (UCI optical digits): 170 zeros plus 6 ones
    from sklearn.datasets import load_digits
    digits = load_digits()
    zeros = digits.data[digits.target == 0][:170]
    ones = digits.data[digits.target == 1][:6]
    X = np.vstack([zeros, ones]).T / 16.0
    d = make_decomposition(X, K, image_shape=(8, 8, 1))
    table = score_table(d, rank=3)
    assert table.limits.q_method == ("jackson-mudholkar" if K == 64 else
                                     "jackson-mudholkar-estimated-tail")
    assert set(table.order[:6].tolist()) == set(range(170, 176))
    assert table.flag[170:].all()


# ----- edge cases ----------------------------------------------------------------------------

def test_rank_zero_uses_q_only():
    d = make_decomposition(gaussian_data(9, n=200)(200), 10)
    t = score_table(d, rank=0)
    assert np.all(t.t2 == 0) and not t.t2_flag.any()
    assert t.limits.t2_rank == 0 and not t.limits.t2_informative
    np.testing.assert_allclose(t.q, d.residual_at_rank(0))
    assert np.all(np.isfinite(t.score))


def test_full_rank_small_collection_flags_nothing_and_has_no_nan():
    X = np.random.default_rng(1).random((40, 10))   # 10 images, rank n-1 = 9
    d = make_decomposition(X, 10)                    # the 10th singular value is ~0
    for k in range(0, 11):
        t = score_table(d, rank=k)
        for arr in (t.q, t.t2, t.score, t.q_ratio, t.t2_ratio):
            assert np.all(np.isfinite(arr))
        if k >= 9:
            assert not t.flag.any()
            assert not t.limits.q_informative and not t.limits.t2_informative
            assert t.limits.note
    t9 = score_table(d, rank=9)
    assert t9.limits.t2_rank == 9
    # at k = n-1 every model image has T2 = (n-1)**2/n (full leverage)
    np.testing.assert_allclose(t9.t2, 81 / 10, rtol=1e-8)
    assert score_table(d, rank=10).limits.t2_rank == 9   # the zero mode is left out


def test_identical_images_give_zero_scores():
    X = np.tile(np.random.default_rng(2).random((25, 1)), (1, 8))
    d = make_decomposition(X, 5)
    t = score_table(d, rank=3)
    assert d.total_energy == 0
    assert np.all(t.score == 0) and not t.flag.any()
    assert t.limits.t2_rank == 0
    new = score_new(d, np.zeros((5, 2)), np.array([0.0, 1.0]), rank=3)
    assert new.flag.tolist() == [False, True]   # any residual is outside a model of no variance
    assert np.all(np.isfinite(new.score))


def test_new_image_with_residual_against_model_without_residual_variance():
    X = np.random.default_rng(3).random((40, 10))
    d = make_decomposition(X, 10)
    w = np.zeros((10, 2))
    res = np.array([1e-20, 5.0])
    t = score_new(d, w, res, rank=9)
    assert t.flag.tolist() == [False, True]
    assert t.limits.t2_method == "f" and np.isfinite(t.limits.t2_limit)


def test_input_validation():
    d = make_decomposition(gaussian_data(10, n=50)(50), 5)
    with pytest.raises(ValueError, match="rank must be at most 5"):
        score_table(d, rank=6)
    with pytest.raises(TypeError, match="rank must be an integer"):
        score_table(d, rank=2.0)
    with pytest.raises(ValueError, match="level"):
        score_table(d, rank=2, level=1.0)
    with pytest.raises(ValueError, match="no residuals"):
        score_table(d.replace(residual=None), rank=2)
    with pytest.raises(TypeError, match="Decomposition"):
        score_table("model.npz")
    with pytest.raises(ValueError, match="at least 2 images"):
        score_table(make_decomposition(np.ones((4, 1)), 0))
    with pytest.raises(ValueError, match="5 rows"):
        score_new(d, np.zeros((4, 3)), np.zeros(3))
    with pytest.raises(ValueError, match="residual must have shape"):
        score_new(d, np.zeros((5, 3)), np.zeros(2))
    with pytest.raises(ValueError, match="finite"):
        score_new(d, np.full((5, 3), np.nan), np.zeros(3))


# ----- command line --------------------------------------------------------------------------

def _parser():
    parser = argparse.ArgumentParser(prog="modescope")
    cli_outliers.register(parser.add_subparsers(dest="command"))
    return parser


@pytest.fixture
def digits_model(monkeypatch):
    from sklearn.datasets import load_digits
    digits = load_digits()
    X = np.vstack([digits.data[digits.target == 0][:60], digits.data[digits.target == 1][:3]]).T
    paths = [f"/data/img_{i:03d}.png" for i in range(63)]
    d = make_decomposition(X / 16.0, 20, image_shape=(8, 8, 1), paths=paths)
    monkeypatch.setattr(cli_outliers, "load_model", lambda path: d)
    return d


def test_cli_outliers_prints_sorted_table_and_caution(digits_model, capsys):
    args = _parser().parse_args(["outliers", "m.npz", "--rank", "3", "--top", "5"])
    assert cli_outliers.run(args) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    header = next(i for i, line in enumerate(lines) if line.startswith("#"))
    assert lines[header].split() == ["#", "number", "path", "score", "q", "q_limit", "t2",
                                     "t2_limit", "beyond", "mark"]
    table = score_table(digits_model, rank=3)
    rows = [lines[header + 1 + j].split() for j in range(5)]
    assert [r[0] for r in rows] == ["1", "2", "3", "4", "5"]          # place in the ranking
    assert [int(r[1]) for r in rows] == [i + 1 for i in table.order[:5]]  # 1-based number
    assert [r[2] for r in rows] == [digits_model.paths[i] for i in table.order[:5]]
    assert [float(r[3]) for r in rows] == pytest.approx(table.score[table.order[:5]], rel=1e-3)
    assert {r[2] for r in rows[:3]} == {f"/data/img_{i:03d}.png" for i in (60, 61, 62)}
    assert {r[1] for r in rows[:3]} == {"61", "62", "63"}
    assert lines[1] == "Rank 3 of 20: given by --rank"
    assert lines[-1] == cli_outliers.CAUTION
    assert "5 of 63 images shown" in out
    # the header names the Q limit method and says why it was chosen
    # (here the moments of modes 4..63 give h0 just below 0: Box, and the reason says so)
    lim = table.limits
    assert lim.q_method == "box"
    assert lines[2].startswith(f"Q limit {lim.q_limit:.4g} (Box); ")
    assert lines[3] == f"Q limit method: {lim.q_reason}."
    assert "because they give h0 = -0.0202 <= 0" in lines[3]
    assert "the eigenvalues of modes 4-20 are known exactly, the modes beyond 20" in lines[3]


def test_cli_outliers_writes_csv_matching_table(digits_model, tmp_path, capsys):
    target = tmp_path / "scores.csv"
    args = _parser().parse_args(["outliers", "m.npz", "--rank", "3", "--csv", str(target)])
    assert cli_outliers.run(args) == 0
    with open(target, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    table = score_table(digits_model, rank=3)
    assert len(rows) == 63
    assert list(rows[0])[:3] == ["number", "path", "page"]
    assert [r["path"] for r in rows] == [digits_model.paths[i] for i in table.order]
    assert [int(r["number"]) for r in rows] == [int(i) + 1 for i in table.order]
    assert [float(r["score"]) for r in rows] == table.score[table.order].tolist()
    # the printed table shows the same numbers in the same order as the CSV
    out = capsys.readouterr().out.splitlines()
    header = next(i for i, line in enumerate(out) if line.split()[:1] == ["#"])
    printed = [line.split()[1] for line in out[header + 1:header + 21]]
    assert printed == [r["number"] for r in rows[:20]]
    # the file exists now: a second run without --overwrite refuses, with --overwrite works
    assert cli_outliers.run(args) == 1
    assert "already exists; use --overwrite" in capsys.readouterr().err
    args = _parser().parse_args(["outliers", "m.npz", "--csv", str(target), "--overwrite"])
    assert cli_outliers.run(args) == 0


def test_cli_outliers_errors(digits_model, capsys, tmp_path):
    args = _parser().parse_args(["outliers", "m.npz", "--rank", "21"])
    assert cli_outliers.run(args) == 2
    assert "--rank must be at most 20" in capsys.readouterr().err
    with pytest.raises(SystemExit) as info:
        _parser().parse_args(["outliers", "m.npz", "--level", "1.5"])
    assert info.value.code == 2
    with pytest.raises(SystemExit) as info:
        _parser().parse_args(["outliers", "m.npz", "--top", "-1"])
    assert info.value.code == 2


def test_cli_outliers_missing_model_file(capsys, tmp_path):
    args = _parser().parse_args(["outliers", str(tmp_path / "missing.npz")])
    assert cli_outliers.run(args) == 1
    err = capsys.readouterr().err
    assert "missing.npz" in err and err.startswith("modescope outliers: error:")


def test_cli_outliers_through_saved_model_and_main(tmp_path, capsys):
    from modescope.app.cli.main import main
    from modescope.core.output.model_file import save_model
    X, planted = _synthetic_collection()
    d = make_decomposition(X, 10, image_shape=(16, 16, 1),
                           paths=[f"/x/{i}.png" for i in range(200)])
    model = save_model(tmp_path / "m.npz", d)
    assert main(["outliers", str(model), "--rank", "3", "--top", "0"]) == 0
    out = capsys.readouterr().out
    table = score_table(d, rank=3)
    assert f"Flagged: {table.n_flagged} of 200" in out
    listed = [line.split()[2] for line in out.splitlines() if line.split()[:1] in
              (["1"], ["2"], ["3"], ["4"])]
    assert set(listed) == {f"/x/{i}.png" for i in planted}
    assert out.rstrip().endswith(cli_outliers.CAUTION)
