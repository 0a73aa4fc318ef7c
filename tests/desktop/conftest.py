"""Fixtures of the workbench tests (pytest-qt, offscreen; see tests/conftest.py)."""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image
from PySide6.QtCore import QSettings

from modescope.app.desktop.settings import Settings
from modescope.core.decomposition import Decomposition, fix_signs


@pytest.fixture(autouse=True)
def _deferred_deletes_done_first(qapp):
    """Delete the widgets earlier tests closed (deleteLater) before this test starts a run.

    Otherwise the GUI thread destroys them inside a later test's event loop while its analysis
    thread emits signals; destroying a Python-made QObject makes PySide take the GIL while Qt
    holds one of its pooled signal/slot mutexes, which deadlocked once against a worker thread
    waiting for that mutex with the GIL held.
    """
    import gc

    from PySide6.QtCore import QCoreApplication, QEvent

    QCoreApplication.sendPostedEvents(None, QEvent.Type.DeferredDelete.value)
    gc.collect()
    yield


@pytest.fixture
def ini_path(tmp_path):
    """The temporary INI file of :func:`ini_settings`."""
    return tmp_path / "modescope-test.ini"


@pytest.fixture
def ini_settings(ini_path):
    """Settings kept in a temporary INI file (never the user's own store)."""
    return Settings(QSettings(str(ini_path), QSettings.Format.IniFormat))


@pytest.fixture(scope="session")
def small_collection(tmp_path_factory):
    """40 demo frames of 48x64 pixels, PNG (lossless), written once per session."""
    from modescope.core import demo

    folder = tmp_path_factory.mktemp("tray")
    demo.write_collection(folder, 40, size=(48, 64), seed=3, fmt="png")
    return folder


@pytest.fixture(scope="session")
def broken_folder(tmp_path_factory):
    """A folder holding only files that claim to be images but are not."""
    folder = tmp_path_factory.mktemp("broken")
    for i in range(3):
        (folder / f"frame_{i}.png").write_bytes(b"this is not a PNG file " * (i + 1))
    return folder


def decomposition_from_arrays(images: np.ndarray, k: int, paths=(), metadata=None):
    """Build an exact Decomposition with numpy.linalg.svd (LAPACK) from images.

    Parameters
    ----------
    images : ndarray, shape (n, rows, cols, channels), float in [0, 1]
    k : int
    """
    n = images.shape[0]
    shape = tuple(images.shape[1:])
    x = images.reshape(n, -1).T.astype(np.float64)          # (pixels, n)
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    basis, weights = fix_signs(u[:, :k], (s[:k, None] * vt[:k]))
    residual = np.sum(c ** 2, axis=0) - np.sum(weights ** 2, axis=0)
    return Decomposition(
        mean=mean.astype(np.float32), basis=basis.astype(np.float32),
        singular_values=s[:k].astype(np.float64), weights=weights.astype(np.float64),
        total_energy=float(np.sum(c ** 2)), image_shape=shape, paths=tuple(paths),
        residual=np.maximum(residual, 0.0), exact=True, metadata=dict(metadata or {}))


@pytest.fixture
def gray_pngs(tmp_path):
    """Eight gray 20x24 PNG files with a few smooth patterns plus noise; returns (paths, images).

    ``images`` has shape (8, 20, 24, 1) and holds the file contents divided by 255, which is
    how Pillow's 8-bit gray values are scaled by the reader.
    """
    rng = np.random.default_rng(11)
    rows, cols = 20, 24
    yy, xx = np.mgrid[0:rows, 0:cols]
    patterns = [np.sin(xx / 3.0), np.cos(yy / 4.0), (xx * yy) / (rows * cols)]
    paths, arrays = [], []
    for i in range(8):
        img = 0.5 + sum(rng.normal(0, 0.12) * p for p in patterns) + rng.normal(0, 0.02,
                                                                               (rows, cols))
        u8 = np.clip(np.rint(img * 255), 0, 255).astype(np.uint8)
        path = tmp_path / f"img_{i:02d}.png"
        Image.fromarray(u8).save(path)
        paths.append(str(path))
        arrays.append(u8.astype(np.float32) / 255.0)
    images = np.stack(arrays)[..., None]
    return paths, images


@pytest.fixture
def gray_decomposition(gray_pngs):
    """An exact rank-5 Decomposition of ``gray_pngs`` whose paths point at the files."""
    paths, images = gray_pngs
    meta = {"source_size": [20, 24], "color": "gray", "downscale": 1,
            "resize_mismatched": False}
    return decomposition_from_arrays(images, 5, paths, meta)


@pytest.fixture
def make_decomposition():
    """The :func:`decomposition_from_arrays` helper, for tests that build their own data."""
    return decomposition_from_arrays


@pytest.fixture
def state(dec):
    """An AppState holding the module's ``dec`` decomposition (modules that analyse something
    else define their own ``state``)."""
    from modescope.app.desktop.state import AppState

    s = AppState()
    s.set_decomposition(dec)
    return s
