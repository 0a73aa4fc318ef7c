"""Tests of modescope.core.output.tables: the weights, spectrum and quality CSV tables.

Outside references: singular values from scipy.linalg.svdvals (LAPACK), numpy norms,
scikit-image's ``peak_signal_noise_ratio`` and Python's csv module as the reader.
"""

import numpy as np
import pytest
import scipy.linalg
from skimage.metrics import peak_signal_noise_ratio

from export_testdata import read_csv
from modescope.core.errors import SourceError
from modescope.core.output.export import export
from modescope.core.output.images import preview_image


def test_weights_and_spectrum_tables(tmp_path, gray):
    X, d = gray
    k = 4
    export(d, tmp_path, rank=k, what="weights,spectrum", images=[3, 1, 3, 7])
    rows = read_csv(tmp_path / f"weights_r{k}.csv")
    assert rows[0] == ["path", "page", "w1", "w2", "w3", "w4"]
    assert [r[0] for r in rows[1:]] == [d.paths[3], d.paths[1], d.paths[7]]
    for r, i in zip(rows[1:], [3, 1, 7]):
        assert int(r[1]) == 0
        np.testing.assert_array_equal([float(v) for v in r[2:]], d.weights[:k, i])
    spec = read_csv(tmp_path / "spectrum.csv")
    assert spec[0] == ["index", "singular_value", "energy_share", "cumulative_share"]
    Xd = X.astype(np.float64)
    C = Xd - Xd.mean(1, keepdims=True)
    s = scipy.linalg.svdvals(C)                     # LAPACK reference
    total = np.linalg.norm(C) ** 2                  # numpy Frobenius norm
    values = np.array([[float(v) for v in r] for r in spec[1:]])
    assert values.shape == (d.rank, 4)
    np.testing.assert_array_equal(values[:, 0], np.arange(1, d.rank + 1))
    np.testing.assert_allclose(values[:, 1], s[:d.rank], rtol=1e-10)
    np.testing.assert_allclose(values[:, 2], s[:d.rank] ** 2 / total, rtol=1e-9)
    np.testing.assert_allclose(values[:, 3], np.cumsum(s[:d.rank] ** 2) / total,
                               rtol=1e-9, atol=1e-12)


def test_quality_table_with_a_missing_source(tmp_path, gray):
    X, d = gray
    k = 3

    def loader(dd, i):
        if i == 2:
            raise SourceError(f"{dd.paths[i]}: the source file is missing")
        return X[:, i].reshape(dd.image_shape)

    rep = export(d, tmp_path, rank=k, what="quality", images=[0, 2, 5], loader=loader)
    rows = read_csv(tmp_path / f"quality_r{k}.csv")
    assert rows[0] == ["path", "page", "relative_error", "psnr_db", "note"]
    by_path = {r[0]: r for r in rows[1:]}
    assert "missing" in by_path[d.paths[2]][4] and by_path[d.paths[2]][2] == ""
    for i in (0, 5):
        r = by_path[d.paths[i]]
        src = X[:, i].reshape(12, 16, 1).astype(np.float64)
        est = np.clip(preview_image(d, i, k, clip=False), 0, 1).astype(np.float64)
        assert float(r[3]) == pytest.approx(
            peak_signal_noise_ratio(src, est, data_range=1.0), rel=1e-9)
        assert float(r[2]) == pytest.approx(np.linalg.norm(src - est) / np.linalg.norm(src),
                                            rel=1e-9)
        assert r[4] == ""
    assert d.paths[2] in rep.missing_sources
    assert any("quality" in n for n in rep.notes)


def test_quality_inf_when_exact(tmp_path, gray):
    X, d = gray
    # full rank reconstructs each image exactly (up to float32): use the preview itself as source
    def loader(dd, i):
        return preview_image(dd, i, dd.rank)
    export(d, tmp_path, rank=d.rank, what="quality", images=[0], loader=loader)
    row = read_csv(tmp_path / f"quality_r{d.rank}.csv")[1]
    assert row[3] == "inf" and float(row[2]) == 0.0
