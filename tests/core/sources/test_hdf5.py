"""HDF5 files holding one stack of frames (h5py).

Outside reference: the same frames stored as a ``.npy`` file by numpy's own writer must give
the same images and model; the files are written by h5py itself.
"""

from __future__ import annotations

import numpy as np
import pytest

h5py = pytest.importorskip("h5py")

from modescope.core.engine.options import AnalysisOptions  # noqa: E402
from modescope.core.engine.pipeline import analyze  # noqa: E402
from modescope.core.errors import NoUsableImagesError  # noqa: E402
from modescope.core.sources.decode import load_image  # noqa: E402
from modescope.core.sources.scan import scan_sources  # noqa: E402


def frames(n=20, rows=12, cols=10, channels=None):
    rng = np.random.default_rng(11)
    shape = (n, rows, cols) if channels is None else (n, rows, cols, channels)
    return rng.integers(0, 256, size=shape, dtype=np.uint16).astype(np.uint8)


@pytest.mark.parametrize("channels, color", [(None, "gray"), (3, "rgb")])
def test_a_stack_in_a_group_gives_the_npy_model(tmp_path, channels, color):
    data = frames(channels=channels)
    with h5py.File(tmp_path / "run.h5", "w") as handle:
        handle.create_dataset("meta/time", data=np.arange(20.0))      # 1 axis: not a stack
        handle.create_dataset("fields/frames", data=data, chunks=(1,) + data.shape[1:])
    np.save(tmp_path / "run.npy", data)
    sset = scan_sources([tmp_path / "run.h5"], color=color)
    assert sset.n_images == 20 and [r.page for r in sset.images][:3] == [0, 1, 2]
    np.testing.assert_array_equal(load_image(sset.images[5], sset),
                                  np.asarray(load_image(scan_sources([tmp_path / "run.npy"],
                                                                     color=color).images[5],
                                                        scan_sources([tmp_path / "run.npy"],
                                                                     color=color))))
    options = AnalysisOptions(rank=3, color=color, frames="2::2")
    a = analyze([tmp_path / "run.h5"], options).decomposition
    b = analyze([tmp_path / "run.npy"], options).decomposition
    assert a.pages.tolist() == b.pages.tolist() == list(range(2, 20, 2))
    np.testing.assert_allclose(a.singular_values, b.singular_values, rtol=1e-6)


def test_none_or_several_stacks_are_named(tmp_path):
    with h5py.File(tmp_path / "two.h5", "w") as handle:
        handle["a"] = frames(4)
        handle["b/c"] = frames(5)
    with h5py.File(tmp_path / "none.h5", "w") as handle:
        handle["x"] = np.zeros((3, 3))
    with pytest.raises(NoUsableImagesError, match=r"holds 2 datasets .*/a \(4, 12, 10\)"):
        scan_sources([tmp_path / "two.h5"])
    with pytest.raises(NoUsableImagesError, match="holds no dataset of 3 or 4 axes"):
        scan_sources([tmp_path / "none.h5"])


def test_damaged_or_wrong_type_hdf5_is_named(tmp_path):
    (tmp_path / "junk.h5").write_bytes(b"no hdf5 here" * 50)
    with h5py.File(tmp_path / "cplx.h5", "w") as handle:
        handle["z"] = np.ones((2, 3, 3), np.complex64)
    with h5py.File(tmp_path / "good.h5", "w") as handle:
        handle["f"] = frames(30, 64, 64)
    cut = tmp_path / "cut.h5"
    cut.write_bytes((tmp_path / "good.h5").read_bytes()[:3000])
    for name, words in [("junk.h5", "not an HDF5 file"), ("cplx.h5", "complex numbers"),
                        ("cut.h5", "truncated")]:
        with pytest.raises(NoUsableImagesError) as info:
            scan_sources([tmp_path / name])
        assert f"{tmp_path / name}: " in str(info.value) and words in str(info.value)
