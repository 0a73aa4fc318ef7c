"""Fixtures of the export tests: small exact decompositions and an analysed folder of PNGs."""

import numpy as np
import pytest
from PIL import Image

from export_testdata import make_data, make_decomposition


@pytest.fixture
def gray():
    X = make_data()
    return X, make_decomposition(X, (12, 16, 1))


@pytest.fixture
def rgb():
    X = make_data(rows=8, cols=10, channels=3, m=9, seed=1)
    return X, make_decomposition(X, (8, 10, 3))


@pytest.fixture
def analysed(tmp_path):
    """A folder of 12 gray PNGs analysed by the real pipeline at rank 4, saved as a model."""
    from modescope.core.engine.pipeline import AnalysisOptions, analyze
    from modescope.core.output.model_file import save_model
    X = make_data(rows=10, cols=12, m=12, seed=4)
    src = tmp_path / "src"
    src.mkdir()
    for i in range(X.shape[1]):
        Image.fromarray(np.rint(X[:, i].reshape(10, 12) * 255).astype(np.uint8)).save(
            src / f"f{i:02d}.png")
    result = analyze([src], AnalysisOptions(rank=4, workers=1, oversample=4))
    model = tmp_path / "model.npz"
    save_model(model, result.decomposition)
    return result.decomposition, model, src
