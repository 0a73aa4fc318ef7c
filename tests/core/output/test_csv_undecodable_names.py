"""File names that are not valid UTF-8 in every CSV and path list Modescope writes.

On Linux a file name is bytes; Python decodes the bytes that are not UTF-8 as lone surrogates
(PEP 383, ``os.fsdecode``). The rule under test (documented in modescope.core.output.tables):
each such byte is written as ``\\xNN`` and the file stays valid UTF-8. The reference is the
standard library: ``bytes.decode("utf-8")`` (strict) and the csv module read the files back.
"""

from __future__ import annotations

import csv
import io
import os

import numpy as np
import pytest

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.output.tables import (csv_bytes, escape_undecodable, quality_bytes,
                                          weights_bytes)
from modescope.core.review.marks import write_csv, write_path_list, set_marks, EXCLUDE
from modescope.core.review.outliers import score_table

# b"caf\xe9" is Latin-1 for "café": not valid UTF-8
BAD_NAME = os.fsdecode(b"/data/caf\xe9_\xff.png")
GOOD_NAME = "/data/d\u00e9j\u00e0_vu.png"


def _model(paths) -> Decomposition:
    rng = np.random.default_rng(1)
    X = 0.5 + 0.1 * rng.standard_normal((16, len(paths)))
    mean = X.mean(axis=1)
    C = X - mean[:, None]
    U, s, Vt = np.linalg.svd(C, full_matrices=False)           # LAPACK via numpy
    basis, weights = fix_signs(U[:, :2], s[:2, None] * Vt[:2])
    residual = np.sum((C - basis @ weights) ** 2, axis=0)
    return Decomposition(mean=mean.astype(np.float32), basis=basis.astype(np.float32),
                         singular_values=s[:2].copy(), weights=weights,
                         total_energy=float(np.sum(C ** 2)), image_shape=(4, 4, 1),
                         paths=tuple(paths), residual=residual, exact=True)


def test_escape_rule():
    assert BAD_NAME == "/data/caf\udce9_\udcff.png"      # what os.fsdecode gives on Linux
    assert escape_undecodable(BAD_NAME) == "/data/caf\\xe9_\\xff.png"
    assert escape_undecodable(GOOD_NAME) == GOOD_NAME       # valid names are kept as they are
    assert escape_undecodable("half \ud800 pair") == "half \\ud800 pair"
    with pytest.raises(TypeError, match="text must be a str"):
        escape_undecodable(b"x")


def test_csv_bytes_is_valid_utf8_with_escapes():
    data = csv_bytes(("path", "page"), [(BAD_NAME, 0), (GOOD_NAME, 1)])
    rows = list(csv.reader(io.StringIO(data.decode("utf-8"), newline="")))  # strict decode
    assert rows == [["path", "page"], ["/data/caf\\xe9_\\xff.png", "0"], [GOOD_NAME, "1"]]


def test_export_tables_with_undecodable_names():
    d = _model([BAD_NAME, GOOD_NAME, "/data/plain.png"])
    rows = list(csv.reader(io.StringIO(weights_bytes(d, 2, [0, 1]).decode("utf-8"))))
    assert [r[0] for r in rows[1:]] == ["/data/caf\\xe9_\\xff.png", GOOD_NAME]
    assert float(rows[1][2]) == float(d.weights[0, 0])

    def loader(decomposition, index):
        raise OSError(f"cannot open {decomposition.paths[index]}")

    data, unread = quality_bytes(d, 2, [0], loader)
    rows = list(csv.reader(io.StringIO(data.decode("utf-8"))))
    assert rows[1][0] == "/data/caf\\xe9_\\xff.png"
    assert rows[1][4] == "source not read: cannot open /data/caf\\xe9_\\xff.png"
    assert unread == [BAD_NAME]


def test_marks_csv_and_path_list_with_undecodable_names(tmp_path):
    d = set_marks(_model([BAD_NAME, GOOD_NAME, "/data/plain.png"]), [0, 1], EXCLUDE)
    table = score_table(d, rank=1)
    out = write_csv(tmp_path / "all.csv", d, table, "all")
    rows = list(csv.reader(io.StringIO(out.read_bytes().decode("utf-8"))))
    assert sorted(r[1] for r in rows[1:]) == sorted(       # column 0 is the number
        ["/data/caf\\xe9_\\xff.png", GOOD_NAME, "/data/plain.png"])
    listed = write_path_list(tmp_path / "excluded.txt", d, "excluded")
    assert listed.read_bytes().decode("utf-8") == f"/data/caf\\xe9_\\xff.png\n{GOOD_NAME}\n"
