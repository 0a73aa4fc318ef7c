"""Tests of modescope.core.review.check: new images scored against a frozen model (Phase II).

Outside references named beside each check: scipy.stats.f (the Phase II T^2 limit of Tracy,
Young and Mason 1992), the Jackson and Mudholkar (1979) formula evaluated from LAPACK
eigenvalues (numpy.linalg.eigvalsh) of the reference data, the binomial distribution
(scipy.stats.binom) for a Monte Carlo of false alarms, and scikit-learn's bundled digits.
"""

from __future__ import annotations

import csv
import hashlib
import math

import numpy as np
import pytest
from PIL import Image
from scipy import stats

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.engine.pipeline import AnalysisOptions, analyze
from modescope.core.errors import NoUsableImagesError
from modescope.core.output.model_file import load_model, save_model
from modescope.core.review.check import (CHECK_COLUMNS, CheckResult, check_images, check_rows,
                                         score_columns, write_check_csv)


def make_model(X, K, image_shape=None) -> Decomposition:
    """Exact mean-centred SVD of the columns of X (numpy's LAPACK gesdd), keeping K modes."""
    X = np.asarray(X, dtype=np.float64)
    mean = X.mean(axis=1)
    C = X - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U[:, :K], s[:K, None] * Vt[:K])
    residual = np.sum((C - basis @ weights) ** 2, axis=0)
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:K].copy(), weights=weights,
                         total_energy=float(np.sum(C ** 2)),
                         image_shape=image_shape or (X.shape[0], 1, 1), residual=residual,
                         exact=True)


def low_rank_source(seed, p=12, signal=(3.0, 2.0), noise=0.3):
    """Gaussian images of p pixels: a few strong directions plus white noise of sd ``noise``."""
    rng = np.random.default_rng(seed)
    rot, _ = np.linalg.qr(rng.standard_normal((p, p)))
    directions = rot[:, :len(signal)] * np.asarray(signal)

    def draw(m, rng=rng):
        return (0.5 + directions @ rng.standard_normal((len(signal), m))
                + noise * rng.standard_normal((p, m)))
    return draw


def jackson_mudholkar(lam, level):
    """Jackson and Mudholkar (1979), Q_alpha written from the paper's formula."""
    t1, t2, t3 = (float(np.sum(lam ** i)) for i in (1, 2, 3))
    h0 = 1 - 2 * t1 * t3 / (3 * t2 ** 2)
    c = stats.norm.ppf(level)
    base = c * math.sqrt(2 * t2 * h0 ** 2) / t1 + 1 + t2 * h0 * (h0 - 1) / t1 ** 2
    return t1 * base ** (1 / h0)


# ----- limits against outside formulas -------------------------------------------------------

@pytest.mark.parametrize("k,level", [(1, 0.99), (2, 0.95), (4, 0.999)])
def test_t2_limit_is_the_phase_two_f_formula(k, level):
    draw = low_rank_source(1)
    n = 60
    d = make_model(draw(n), K=8)
    result = score_columns(d, draw(5), rank=k, level=level)
    # outside check: Tracy, Young and Mason (1992) Phase II limit with scipy.stats.f
    expected = k * (n + 1) * (n - 1) / (n * (n - k)) * stats.f.ppf(level, k, n - k)
    assert result.table.limits.t2_method == "f"
    assert result.table.limits.t2_limit == pytest.approx(expected, rel=1e-12)
    assert np.all(result.table.t2_flag == (result.table.t2 > expected))


@pytest.mark.parametrize("k", [1, 2, 5])
def test_q_limit_is_jackson_mudholkar_of_lapack_eigenvalues(k):
    draw = low_rank_source(2)
    X = draw(300)
    d = make_model(X, K=12)             # every mode held: the eigenvalues left out are known
    # outside check: Jackson and Mudholkar (1979) from numpy's LAPACK eigvalsh of the
    # reference covariance (ddof=1), modes k+1..p
    lam = np.sort(np.linalg.eigvalsh(np.cov(X)))[::-1]
    expected = jackson_mudholkar(lam[k:], 0.99)
    result = score_columns(d, draw(3), rank=k)
    assert result.table.limits.q_method == "jackson-mudholkar"
    assert result.table.limits.q_limit == pytest.approx(expected, rel=1e-5)


def test_truncated_model_estimates_the_tail_close_to_the_lapack_eigenvalues():
    draw = low_rank_source(3)
    X = draw(400)
    d = make_model(X, K=6)              # modes 7..12 are not held: the tail is estimated
    lam = np.sort(np.linalg.eigvalsh(np.cov(X)))[::-1]
    expected = jackson_mudholkar(lam[2:], 0.99)   # Jackson and Mudholkar (1979), LAPACK
    limits = score_columns(d, draw(2), rank=2).table.limits
    assert limits.q_method == "jackson-mudholkar-estimated-tail"
    # our estimate of the tail's spread (see core.review.qlimit), not a published bound: 3 %
    assert limits.q_limit == pytest.approx(expected, rel=0.03)


def test_q_and_t2_of_a_new_image_are_its_projection():
    draw = low_rank_source(4)
    d = make_model(draw(80), K=12)
    x = draw(1)
    result = score_columns(d, x, rank=2)
    c = x[:, 0] - d.mean.astype(np.float64)
    w = d.basis.T.astype(np.float64) @ c
    lam = d.singular_values ** 2 / (d.n_images - 1)
    assert result.table.q[0] == pytest.approx(float(np.sum(w[2:] ** 2)), rel=1e-4)
    assert result.table.t2[0] == pytest.approx(float(np.sum(w[:2] ** 2 / lam[:2])), rel=1e-4)
    assert result.table.score[0] == pytest.approx(max(result.table.q_ratio[0],
                                                      result.table.t2_ratio[0]))


# ----- Monte Carlo: false alarms of in-distribution images -----------------------------------

def test_false_alarm_rate_over_10000_new_images_is_within_the_binomial_interval():
    # 100 reference sets of 400 images, 100 new images each: 10,000 new images in all. The
    # Phase II limits are statements about a new image and a reference set drawn together,
    # so the reference set is drawn again for each group of new images.
    level, k, sets, per_set = 0.99, 2, 100, 100
    q_alarms = t2_alarms = 0
    for seed in range(sets):
        draw = low_rank_source(1000 + seed)
        d = make_model(draw(400), K=12)
        table = score_columns(d, draw(per_set), rank=k, level=level).table
        q_alarms += int(np.count_nonzero(table.q_flag))
        t2_alarms += int(np.count_nonzero(table.t2_flag))
    total = sets * per_set
    # outside check: the 99.9 % interval of Binomial(10,000, 0.01) from scipy.stats.binom
    low, high = stats.binom.interval(0.999, total, 1 - level)
    assert low <= q_alarms <= high, (q_alarms, low, high)
    assert low <= t2_alarms <= high, (t2_alarms, low, high)


# ----- scikit-learn's digits: zeros against sevens -------------------------------------------

def test_a_model_of_digit_zeros_flags_sevens_and_few_held_out_zeros():
    datasets = pytest.importorskip("sklearn.datasets")
    digits = datasets.load_digits()        # scikit-learn's bundled digits (8x8, 0..16)
    X = digits.data.T / 16.0
    zeros = np.flatnonzero(digits.target == 0)
    sevens = np.flatnonzero(digits.target == 7)[:10]
    train, held = zeros[:150], zeros[150:]
    d = make_model(X[:, train], K=20, image_shape=(8, 8, 1))
    # rank 3 at level 0.99: 10 of 10 sevens and 2 of 28 held-out zeros flagged. At higher
    # ranks Q flags more held-out zeros (rank 10: 8 of 28): with 150 reference images of 64
    # pixels, the reference images' own residual eigenvalues are smaller than a new image's
    # (the fit follows its own images), and the digits are not Gaussian (observed here).
    k = 3
    on_sevens = score_columns(d, X[:, sevens], rank=k)
    on_zeros = score_columns(d, X[:, held], rank=k)
    assert on_sevens.n_flagged >= 9
    assert on_zeros.n_flagged <= 2, on_zeros.n_flagged        # of 28 held-out zeros


# ----- validation ----------------------------------------------------------------------------

def test_score_columns_validates_its_inputs():
    d = make_model(low_rank_source(5)(40), K=4)
    with pytest.raises(ValueError, match=r"data must have shape \(12, m\)"):
        score_columns(d, np.zeros((11, 2)))
    with pytest.raises(ValueError, match="finite"):
        score_columns(d, np.full((12, 1), np.nan))
    with pytest.raises(TypeError, match="data must be an array"):
        score_columns(d, "images")
    with pytest.raises(ValueError, match="rank"):
        score_columns(d, np.zeros((12, 1)), rank=5)
    with pytest.raises(ValueError, match="level"):
        score_columns(d, np.zeros((12, 1)), level=1.0)
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        score_columns("model.npz", np.zeros((12, 1)))
    snapshot = d.replace(residual=None)
    with pytest.raises(ValueError, match="scoring pass"):
        score_columns(snapshot, np.zeros((12, 1)))


# ----- files: the model's reading options, skipped files, CSV, progress, cancel --------------

def _write_frames(folder, draw, count, shape=(6, 8), offset=0):
    folder.mkdir(exist_ok=True)
    data = np.clip(draw(count), 0, 1)
    for i in range(count):
        img = (data[:, i].reshape(shape) * 255).round().astype(np.uint8)
        Image.fromarray(img).save(folder / f"f_{offset + i:03d}.png")


@pytest.fixture()
def model_and_new(tmp_path):
    draw = low_rank_source(6, p=48, signal=(0.15, 0.1), noise=0.03)
    _write_frames(tmp_path / "ref", draw, 60)
    _write_frames(tmp_path / "new", draw, 8, offset=100)
    result = analyze([str(tmp_path / "ref")], AnalysisOptions(rank=6))
    model = tmp_path / "m.npz"
    save_model(model, result.decomposition)
    return model, tmp_path / "new"


def test_check_images_reads_files_like_the_model_and_leaves_it_unchanged(model_and_new,
                                                                         tmp_path):
    model, new = model_and_new
    before = hashlib.sha256(model.read_bytes()).hexdigest()
    d = load_model(model)
    Image.fromarray(np.zeros((5, 5), np.uint8)).save(new / "odd.png")
    Image.fromarray(np.zeros((6, 8, 3), np.uint8)).save(new / "colour.png")
    seen = []
    result = check_images(d, [str(new)], rank=3, progress=seen.append)
    assert isinstance(result, CheckResult) and not result.cancelled
    assert result.n_images == 9              # 8 frames + the colour file as its luma
    reasons = [str(p) for p in result.problems]
    assert len(reasons) == 1 and "odd.png" in reasons[0]
    assert "size 5x5 differs from the model's 6x8; skipped" in reasons[0]
    assert seen[-1].stage == "check" and seen[-1].done == seen[-1].total == 10 - 1
    # the same numbers as projecting the decoded images by hand
    from modescope.core.review.maps import read_like_model
    cols = np.stack([read_like_model(d, p).reshape(-1) for p in result.paths], axis=1)
    by_hand = score_columns(d, cols, rank=3)
    np.testing.assert_allclose(result.table.q, by_hand.table.q, rtol=1e-6)
    np.testing.assert_allclose(result.table.t2, by_hand.table.t2, rtol=1e-6)
    colour = result.paths.index(str(new / "colour.png"))
    assert result.table.flag[colour]         # a black frame is far from the model
    # with resizing, the odd size is read too (as analyze --resize-mismatched does)
    resized = check_images(d, [str(new)], rank=3, resize_mismatched=True)
    assert resized.n_images == 10 and not resized.problems
    assert hashlib.sha256(model.read_bytes()).hexdigest() == before


def test_gray_files_are_skipped_against_a_colour_model(tmp_path):
    rng = np.random.default_rng(7)
    (tmp_path / "ref").mkdir()
    for i in range(12):
        img = (rng.random((4, 5, 3)) * 255).astype(np.uint8)
        Image.fromarray(img).save(tmp_path / "ref" / f"c_{i}.png")
    d = analyze([str(tmp_path / "ref")], AnalysisOptions(rank=3, color="rgb")).decomposition
    (tmp_path / "new").mkdir()
    Image.fromarray(np.zeros((4, 5), np.uint8)).save(tmp_path / "new" / "gray.png")
    Image.fromarray(np.zeros((4, 5, 3), np.uint8)).save(tmp_path / "new" / "rgb.png")
    result = check_images(d, [str(tmp_path / "new")])
    assert [p.rsplit("/", 1)[-1] for p in result.paths] == ["rgb.png"]
    assert "gray file (mode L) but the model is colour (rgb); skipped" in str(result.problems[0])
    with pytest.raises(NoUsableImagesError, match="gray.png"):
        check_images(d, [str(tmp_path / "new" / "gray.png")])


def test_cancel_scores_what_was_read(model_and_new):
    model, new = model_and_new
    d = load_model(model)
    result = check_images(d, [str(new)], block_size=3, cancel=lambda: True)
    assert result.cancelled
    # the scan itself was cancelled before any image: nothing scored, nothing raised
    assert result.n_images == 0 and result.table.n_images == 0
    seen = []
    result = check_images(d, [str(new)], block_size=3, progress=seen.append,
                          cancel=lambda: any(p.done > 0 for p in seen))
    assert result.cancelled and 0 < result.n_images < 8


def test_csv_has_the_columns_and_one_row_per_image(model_and_new, tmp_path):
    model, new = model_and_new
    d = load_model(model)
    result = check_images(d, [str(new)], rank=2)
    out = write_check_csv(tmp_path / "check.csv", result)
    with open(out, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == CHECK_COLUMNS
    assert [int(r["number"]) for r in rows] == list(range(1, 9))
    for r, mine in zip(rows, check_rows(result)):
        assert r["path"] == mine["path"] and int(r["flag"]) == int(mine["flag"])
        assert float(r["q"]) == mine["q"] and float(r["t2_limit"]) == mine["t2_limit"]
    with pytest.raises(Exception, match="exists"):
        write_check_csv(tmp_path / "check.csv", result)
    with pytest.raises(Exception, match="source"):
        write_check_csv(result.paths[0], result, overwrite=True)
