"""Model file round trip and clear errors for damaged or foreign files."""

import json
import zipfile

import numpy as np
import pytest

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModelFileError
from modescope.core.output.model_file import load_model, save_model


def make_decomposition(n=12, shape=(4, 5, 1), k=3, seed=0):
    # built from LAPACK (numpy.linalg.svd) of a small centred matrix
    rng = np.random.default_rng(seed)
    x = rng.random((int(np.prod(shape)), n))
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    w = u[:, :k].T @ c
    res = np.sum((c - u[:, :k] @ w) ** 2, axis=0)
    return Decomposition(mean=mean.astype(np.float32), basis=u[:, :k].astype(np.float32),
                         singular_values=s[:k], weights=w, total_energy=float(np.sum(c ** 2)),
                         image_shape=shape, paths=tuple(f"/data/frame_{i}.png" for i in range(n)),
                         residual=res, exact=True,
                         marks=np.array([0, 1, 2] * (n // 3), dtype=np.int8),
                         metadata={"options": {"rank": k}, "problems": []})


def test_round_trip(tmp_path):
    d = make_decomposition()
    path = save_model(tmp_path / "model", d)
    assert path.name == "model.npz"
    e = load_model(path)
    for name in ("mean", "basis", "singular_values", "weights", "residual", "pages", "marks"):
        np.testing.assert_array_equal(getattr(e, name), getattr(d, name))
    assert e.paths == d.paths and e.image_shape == d.image_shape and e.exact
    assert e.total_energy == d.total_energy
    assert e.metadata["options"] == {"rank": 3}
    assert e.metadata["format"] == "modescope-model"
    # the file is plain numpy: readable without pickle by numpy itself
    with np.load(path, allow_pickle=False) as raw:
        assert raw["basis"].shape == (20, 3)
        assert json.loads(str(raw["metadata"]))["format_version"] == 1
    # no temporary file is left behind
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model.npz"]


def test_float16_compact(tmp_path):
    d = make_decomposition()
    e = load_model(save_model(tmp_path / "small.npz", d, dtype=np.float16))
    assert e.basis.dtype == np.float32
    np.testing.assert_allclose(e.basis, d.basis, atol=1e-3)


def test_overwrite_refused(tmp_path):
    d = make_decomposition()
    save_model(tmp_path / "m.npz", d)
    with pytest.raises(ModelFileError, match="already exists"):
        save_model(tmp_path / "m.npz", d, overwrite=False)


def test_unwritable_folder_message(tmp_path):
    with pytest.raises(ModelFileError, match="cannot write into"):
        save_model(tmp_path / "missing" / "m.npz", make_decomposition())


def test_damaged_files(tmp_path):
    good = save_model(tmp_path / "good.npz", make_decomposition())
    truncated = tmp_path / "truncated.npz"
    truncated.write_bytes(good.read_bytes()[:200])
    with pytest.raises(ModelFileError, match="truncated.npz: not a usable Modescope model file"):
        load_model(truncated)
    text = tmp_path / "notes.npz"
    text.write_text("hello")
    with pytest.raises(ModelFileError, match="damaged or not an .npz"):
        load_model(text)
    with pytest.raises(ModelFileError, match="no such file"):
        load_model(tmp_path / "absent.npz")


def test_foreign_and_inconsistent_files(tmp_path):
    foreign = tmp_path / "foreign.npz"
    np.savez(foreign, a=np.arange(3))
    with pytest.raises(ModelFileError, match="missing entries mean"):
        load_model(foreign)
    pickled = tmp_path / "pickled.npz"
    d = make_decomposition()
    arrays = dict(np.load(save_model(tmp_path / "base.npz", d)))
    arrays["paths"] = np.array([object()] * d.n_images, dtype=object)
    np.savez(pickled, **arrays)
    with pytest.raises(ModelFileError, match="'paths' holds Python objects \\(pickled data\\), "
                                             "which Modescope never loads") as info:
        load_model(pickled)
    assert "allow_pickle" not in str(info.value)
    arrays = dict(np.load(tmp_path / "base.npz"))
    arrays["basis"] = arrays["basis"][:5]
    np.savez(tmp_path / "shape.npz", **arrays)
    with pytest.raises(ModelFileError, match="do not fit together.*basis must have shape"):
        load_model(tmp_path / "shape.npz")
    arrays = dict(np.load(tmp_path / "base.npz"))
    arrays["mean"] = arrays["mean"].copy()
    arrays["mean"][0] = np.nan
    np.savez(tmp_path / "nan.npz", **arrays)
    with pytest.raises(ModelFileError, match="'mean' holds NaN"):
        load_model(tmp_path / "nan.npz")
    arrays = dict(np.load(tmp_path / "base.npz"))
    arrays["metadata"] = np.array("{not json")
    np.savez(tmp_path / "meta.npz", **arrays)
    with pytest.raises(ModelFileError, match="'metadata' is not JSON"):
        load_model(tmp_path / "meta.npz")


def test_zip_with_garbage_member(tmp_path):
    good = save_model(tmp_path / "good.npz", make_decomposition())
    path = tmp_path / "z.npz"
    with zipfile.ZipFile(good) as src, zipfile.ZipFile(path, "w") as dst:
        for name in src.namelist():
            dst.writestr(name, b"garbage" if name == "weights.npy" else src.read(name))
    with pytest.raises(ModelFileError, match="z.npz"):
        load_model(path)
