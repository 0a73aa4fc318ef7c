"""Adding images to an existing analysis equals analysing everything at once."""

import numpy as np
import pytest
from PIL import Image

from modescope.app.cli.main import main
from modescope.core.errors import NoUsableImagesError, SourceError
from modescope.core.output.model_file import load_model, save_model
from modescope.core.engine.pipeline import AnalysisOptions, analyze, update_analysis


@pytest.fixture()
def two_folders(tmp_path):
    rng = np.random.default_rng(0)
    base = rng.random((4, 14, 18))
    first, second = tmp_path / "first", tmp_path / "second"
    first.mkdir()
    second.mkdir()
    arrays = []
    for i in range(100):
        v = 0.4 + 0.1 * np.tensordot(rng.normal(size=4), base - 0.5, 1)
        v += 0.01 * rng.normal(size=v.shape)
        a = np.clip(np.round(v * 255), 0, 255).astype(np.uint8)
        arrays.append(a)
        Image.fromarray(a).save((first if i < 60 else second) / f"f_{i}.png")
    x = np.stack([a.ravel() / 255.0 for a in arrays], axis=1)
    return first, second, x


def test_update_matches_lapack_and_one_run(two_folders):
    first, second, x = two_folders
    opts = AnalysisOptions(rank=8)
    base = analyze([first], opts).decomposition
    base = base.replace(marks=np.where(np.arange(60) == 5, 2, 0).astype(np.int8))
    result = update_analysis(base, [second])
    d = result.decomposition
    assert d.exact and d.n_images == 100 and not result.cancelled
    assert d.paths[:60] == base.paths and d.paths[60].endswith("f_60.png")
    assert d.marks[5] == 2 and d.marks[60:].sum() == 0        # review marks kept
    # reference: LAPACK SVD (numpy.linalg.svd) of all 100 centred images
    c = x - x.mean(axis=1, keepdims=True)
    s = np.linalg.svd(c, compute_uv=False)
    np.testing.assert_allclose(d.singular_values[:4], s[:4], rtol=1e-4)
    np.testing.assert_allclose(d.mean, x.mean(axis=1), atol=1e-5)
    assert d.total_energy == pytest.approx(np.sum(c ** 2), rel=1e-6)
    one = analyze([first, second], opts).decomposition
    np.testing.assert_allclose(d.singular_values[:4], one.singular_values[:4], rtol=1e-4)
    # adding the same files again finds nothing new
    with pytest.raises(NoUsableImagesError, match="already in the analysis"):
        update_analysis(d, [first])


def test_update_leaves_out_a_missing_old_file(two_folders):
    first, second, _ = two_folders
    base = analyze([first], AnalysisOptions(rank=4)).decomposition
    (first / "f_3.png").unlink()
    result = update_analysis(base, [second])
    d = result.decomposition
    assert d.exact and d.n_images == 99 and str(first / "f_3.png") not in d.paths
    assert any("f_3.png" in p.path and "does not exist" in p.reason for p in result.problems)


def test_update_refuses_mismatched_colour(two_folders):
    first, second, _ = two_folders
    base = analyze([first], AnalysisOptions(rank=4)).decomposition
    with pytest.raises(SourceError, match="the analysis is gray"):
        update_analysis(base, [second], AnalysisOptions(rank=4, color="rgb"))


def test_update_command(two_folders, tmp_path, capsys):
    first, second, _ = two_folders
    model = tmp_path / "m.npz"
    assert main(["analyze", str(first), "-o", str(model), "--rank", "5", "--quiet"]) == 0
    assert main(["update", str(model), str(second), "-o", str(model), "--quiet",
                 "--overwrite"]) == 0
    assert load_model(model).n_images == 100
    assert "added 40 images to 60" in capsys.readouterr().err


def test_update_command_names_old_files_left_out(two_folders, tmp_path, capsys):
    first, second, _ = two_folders
    model = tmp_path / "m.npz"
    assert main(["analyze", str(first), "-o", str(model), "--rank", "5", "--quiet"]) == 0
    (first / "f_3.png").unlink()
    out = tmp_path / "m2.npz"
    assert main(["update", str(model), str(second), "-o", str(out), "--quiet"]) == 0
    err = capsys.readouterr().err
    assert "added 40 images to 60 images (1 old could not be read again and were left out)" in err
    assert "f_3.png" in err and load_model(out).n_images == 99


def test_update_of_a_partial_model_uses_the_rank_asked_for(two_folders):
    from modescope.core.engine.options import stored_options

    first, second, x = two_folders
    d = analyze([first], AnalysisOptions(rank=8)).decomposition
    # a partial result holding 3 of the 8 modes asked for (a run stopped early)
    partial = d.replace(exact=False, basis=d.basis[:, :3], singular_values=d.singular_values[:3],
                        weights=d.weights[:3], singular_value_error=None, residual=None)
    assert partial.rank == 3 and stored_options(partial).rank == 8
    result = update_analysis(partial, [second])
    assert result.decomposition.rank == 8 and result.decomposition.n_images == 100
    # reference: LAPACK SVD (numpy.linalg.svd) of all 100 centred images
    c = x - x.mean(axis=1, keepdims=True)
    s = np.linalg.svd(c, compute_uv=False)
    np.testing.assert_allclose(result.decomposition.singular_values[:4], s[:4], rtol=1e-4)
    # without stored options: the default rank, or the model's when it is larger
    bare = partial.replace(metadata={k: v for k, v in partial.metadata.items()
                                     if k != "options"})
    assert stored_options(bare).rank == AnalysisOptions().rank
    with pytest.raises(TypeError, match="'options' must be a dict of analysis options, got str"):
        stored_options(partial.replace(metadata={"options": "rank=8"}))
    with pytest.raises(TypeError, match="decomposition must be a Decomposition, got NoneType"):
        stored_options(None)


def test_cli_update_of_a_partial_model_uses_the_rank_asked_for(two_folders, tmp_path):
    first, second, _ = two_folders
    d = analyze([first], AnalysisOptions(rank=6)).decomposition
    partial = d.replace(exact=False, basis=d.basis[:, :2], singular_values=d.singular_values[:2],
                        weights=d.weights[:2], singular_value_error=None, residual=None)
    save_model(tmp_path / "partial.npz", partial)
    assert main(["update", str(tmp_path / "partial.npz"), str(second), "-o",
                 str(tmp_path / "done.npz"), "--quiet"]) == 0
    done = load_model(tmp_path / "done.npz")
    assert done.rank == 6 and done.n_images == 100 and done.exact
