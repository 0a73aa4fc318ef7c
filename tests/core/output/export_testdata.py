"""Shared data makers of the export tests (imported by name: pytest puts this folder on the path).

Exact decompositions come from numpy.linalg.svd (LAPACK) of the full centred matrix.
"""

import csv
import os
from pathlib import Path

import numpy as np

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.output.atomic import is_temp_name


def make_data(rows=12, cols=16, channels=1, m=14, seed=0):
    """Low-rank structure plus noise, every value inside [0.1, 0.9]."""
    rng = np.random.default_rng(seed)
    n = rows * cols * channels
    patterns = rng.standard_normal((n, 4))
    coeffs = rng.standard_normal((4, m)) * np.array([[3.0], [2.0], [1.0], [0.5]])
    X = patterns @ coeffs + 0.3 * rng.standard_normal((n, m))
    X = 0.5 + 0.4 * X / np.max(np.abs(X))
    return X.astype(np.float32)


def make_decomposition(X, shape, paths=None, pages=None, metadata=None):
    """Exact Decomposition from numpy.linalg.svd of the full centred matrix."""
    Xd = X.astype(np.float64)
    mean = Xd.mean(axis=1)
    C = Xd - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)
    basis, weights = fix_signs(U, s[:, None] * Vt)
    m = X.shape[1]
    return Decomposition(
        mean=mean.astype(np.float32), basis=basis.astype(np.float32), singular_values=s,
        weights=weights, total_energy=float(np.sum(C ** 2)), image_shape=shape,
        paths=tuple(paths) if paths is not None else tuple(f"/nowhere/img_{i:02d}.png"
                                                           for i in range(m)),
        pages=None if pages is None else np.asarray(pages, dtype=np.int32),
        residual=np.zeros(m), exact=True, metadata=dict(metadata or {}))


def array_loader(X):
    def load(d, i):
        return X[:, i].reshape(d.image_shape)
    return load


def listing(folder):
    return sorted(os.listdir(folder))


def no_temp_files(folder):
    return not any(is_temp_name(n) or n.startswith(".") for n in os.listdir(folder))


def is_root_like(folder):
    """True when chmod 0o555 does not stop writes (running as root)."""
    probe = Path(folder) / "probe"
    try:
        probe.write_bytes(b"x")
    except PermissionError:
        return False
    probe.unlink()
    return True


def read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))
