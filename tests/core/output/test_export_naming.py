"""Tests of modescope.core.output.naming: preview names and the choice of images."""

import numpy as np

from export_testdata import make_decomposition
from modescope.core.output.export import export
from modescope.core.output.naming import preview_names, select_images


def test_names_multi_page_and_collisions(gray):
    X, _ = gray
    paths = (["/a/frame.png", "/b/frame.png", "/c/FRAME.tif", "/d/stack.tif", "/d/stack.tif",
              "/e/single.png", "/f/page.tif"] + [f"/g/x{i}.png" for i in range(7)])
    pages = [0, 0, 0, 0, 1, 0, 3] + [0] * 7
    d = make_decomposition(X, (12, 16, 1), paths=paths, pages=pages)
    names = preview_names(d, range(14), 5, "png")
    assert names[:7] == ["frame_i0_r5.png", "frame_i1_r5.png", "FRAME_i2_r5.png",
                         "stack_p0_r5.png", "stack_p1_r5.png", "single_r5.png",
                         "page_p3_r5.png"]
    assert len({n.casefold() for n in names}) == 14
    # a name does not depend on which images are chosen
    assert preview_names(d, [1], 5, "png") == ["frame_i1_r5.png"]
    assert preview_names(d, [5], 2, "tiff") == ["single_r2.tif"]


def test_names_resolve_second_order_collisions(gray):
    X, _ = gray
    paths = ["/a/x.png", "/b/x.png", "/c/x_i1.png"] + [f"/g/y{i}.png" for i in range(11)]
    d = make_decomposition(X, (12, 16, 1), paths=paths)
    names = preview_names(d, range(14), 1, "png")
    assert len({n.casefold() for n in names}) == 14


def test_flagged_selection_uses_outlier_table(tmp_path, gray):
    from modescope.core.review.outliers import score_table
    X, d = gray
    X2 = X.copy()
    X2[:, 4] = np.clip(X2[:, 4] + 0.35 * np.sign(np.sin(np.arange(X.shape[0]))), 0, 1)
    d = make_decomposition(X2, (12, 16, 1))
    flags = np.flatnonzero(score_table(d, 2, 0.99).flag)
    np.testing.assert_array_equal(select_images(d, "flagged", rank=2), flags)
    rep = export(d, tmp_path, rank=2, what="previews", images="flagged")
    assert rep.n_written == flags.size
