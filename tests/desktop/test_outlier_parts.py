"""The outlier view's parts on their own: the limits text, the table widget and the Q/T² plot.

Reference values: ``core.review.outliers.score_table`` of a small decomposition built from
numpy.linalg.svd (LAPACK) in conftest; the log-axis floor rule is the plot's own (documented in
its module docstring: values of 0 drawn a decade below the smallest positive value or limit).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from PySide6.QtCore import QSortFilterProxyModel
from PySide6.QtGui import QStandardItemModel

from modescope.app.desktop.views.outliers_model import (OutlierFilterProxy, OutlierTableModel,
                                                        describe_limits)
from modescope.app.desktop.views.outliers_plot import OutlierPlot
from modescope.app.desktop.views.outliers_table import OutlierTableView
from modescope.core.review import marks as review
from modescope.core.review.outliers import score_table

ROWS, COLS, N, K = 10, 12, 24, 5


@pytest.fixture
def dec(make_decomposition):
    rng = np.random.default_rng(11)
    images = rng.random((N, ROWS, COLS, 1)).astype(np.float32)
    images[3] += 0.8                                    # one frame far from the rest
    return make_decomposition(np.clip(images, 0, 1), K, [f"f{i:02d}.png" for i in range(N)])


@pytest.fixture
def table(dec):
    return score_table(dec, 3, 0.99)


@pytest.fixture
def plot(qtbot):
    p = OutlierPlot(names=lambda i: f"name {i}")
    qtbot.addWidget(p)
    return p


# ===== limits text ==============================================================================
def test_describe_limits_text_and_explanation(table):
    lim = table.limits
    text, tip = describe_limits(lim)
    assert lim.q_method == "jackson-mudholkar-estimated-tail" and lim.t2_method == "beta"
    assert text == (f"Q limit {lim.q_limit:.4g} (Jackson-Mudholkar, tail estimated) · "
                    f"T² limit {lim.t2_limit:.4g} (Beta)")
    assert tip.startswith(f"Q limit: {lim.q_reason}.\n")
    assert lim.q_reason.startswith("Jackson-Mudholkar (1979) from the eigenvalues of modes 4-5, "
                                   "which the model holds, and the modes beyond 5")
    assert (f"T² limit: Beta form for the images that built the model (Tracy, Young and Mason "
            f"1992, Phase I), over {lim.t2_rank} modes.\nConfidence level 99 %.") in tip
    assert "Note:" not in tip
    none, tip = describe_limits(dataclasses.replace(lim, q_informative=False,
                                                    t2_informative=False, note="a note"))
    assert none == "Q limit: none · T² limit: none"
    assert tip.endswith("\n\nNote: a note.")


def test_describe_limits_names_the_f_form_for_new_images(dec):
    from modescope.core.review.outliers import score_new

    # new images scored against the model: their T² limit is the F form (Phase II)
    new = score_new(dec, dec.weights[:, :4], dec.residual[:4], rank=3, level=0.95)
    lim = new.limits
    assert lim.t2_method == "f"
    text, tip = describe_limits(lim)
    assert text.endswith(f"T² limit {lim.t2_limit:.4g} (F)")
    assert ("T² limit: F form for new images scored against the model (Tracy, Young and Mason "
            "1992, Phase II), over 3 modes.\nConfidence level 95 %.") in tip
    assert "Beta" not in tip


def test_describe_limits_refuses_other_types(table):
    with pytest.raises(TypeError, match="limits must be a ControlLimits, got dict"):
        describe_limits({"q_limit": table.limits.q_limit})


# ===== table widget =============================================================================
def test_table_view_refuses_other_models(qtbot):
    with pytest.raises(TypeError, match="source must be an OutlierTableModel, got "
                                        "QStandardItemModel"):
        OutlierTableView(QStandardItemModel(), OutlierFilterProxy())
    with pytest.raises(TypeError, match="proxy must be an OutlierFilterProxy, got "
                                        "QSortFilterProxyModel"):
        OutlierTableView(OutlierTableModel(), QSortFilterProxyModel())


def test_table_view_selects_rows_by_image(qtbot, dec, table):
    model, proxy = OutlierTableModel(), OutlierFilterProxy()
    view = OutlierTableView(model, proxy)
    qtbot.addWidget(view)
    model.set_scores(dec, table)
    np.testing.assert_array_equal(view.shown_images(), table.order)   # most unusual first
    assert view.shown_images()[0] == 3
    chosen = [int(table.order[1]), int(table.order[2]), int(table.order[5])]
    view.select_images(chosen, chosen[2])
    assert view.selected_images() == (sorted(chosen), chosen[2])
    assert view.proxy_row(chosen[2]) == 5 and view.image_at(5) == chosen[2]
    # filtered out: no row
    proxy.set_mode("excluded")
    assert view.proxy_row(chosen[0]) == -1 and view.shown_images().size == 0


# ===== plot =====================================================================================
def test_plot_draws_scores_in_log_and_linear_units(plot, table):
    plot.show_scores(table, np.zeros(N, dtype=np.int8))      # log axes at first:
    x, y = plot.scatter.getData()
    np.testing.assert_allclose(x, np.log10(table.t2), rtol=1e-12)
    np.testing.assert_allclose(y, np.log10(table.q), rtol=1e-12)
    np.testing.assert_allclose(plot.plot_values()[1], table.q, rtol=1e-12)
    assert plot.limit_positions() == pytest.approx((table.limits.t2_limit,
                                                    table.limits.q_limit), rel=1e-12)
    plot.set_log(False)
    x, y = plot.scatter.getData()
    np.testing.assert_array_equal(x, table.t2)
    np.testing.assert_array_equal(y, table.q)
    assert plot.q_line.value() == table.limits.q_limit
    # the tooltip says why each limit is what it is (the Q method's reason included)
    lim = table.limits
    assert plot.toolTip().endswith(describe_limits(lim)[1])
    assert f"Q limit: {lim.q_reason}." in plot.toolTip()
    assert plot.q_line.label.toolTip() == (
        f"Q limit {lim.q_limit:.5g} (Jackson-Mudholkar, tail estimated, 99 % level): "
        f"{lim.q_reason}")


def test_plot_draws_zero_a_decade_below_the_smallest_value(plot, table):
    q = table.q.copy()
    q[0] = 0.0
    smallest = min(float(q[q > 0].min()), table.limits.q_limit)
    plot.show_scores(dataclasses.replace(table, q=q), np.zeros(N, dtype=np.int8))
    _, y = plot.scatter.getData()
    assert y[0] == pytest.approx(np.log10(smallest) - 1.0, rel=1e-12)


def test_plot_selection_marks_and_empty(plot, table):
    marks = np.zeros(N, dtype=np.int8)
    plot.show_scores(table, marks)
    plot.set_log(False)
    plot.show_selection(4, (1, 2, 99))          # 99 is not an image: left out
    assert plot.sel_mark.getData()[0].tolist() == [table.t2[4]]
    np.testing.assert_array_equal(plot.set_marks_item.getData()[0], table.t2[[1, 2]])
    marks[7] = review.EXCLUDE
    plot.set_marks(marks)
    brushes = [p.brush().color().getRgb() for p in plot.scatter.points()]
    assert brushes[7] == (150, 150, 150, 200)                       # excluded: gray
    assert plot._point_tip(0, 0, 7).startswith("image 8: name 7\nQ = ")
    plot.show_scores(None, marks)
    assert plot.scatter.getData()[0].size == 0 and plot.sel_mark.getData()[0].size == 0
    assert not plot.q_line.isVisible() and not plot.t2_line.isVisible()


def test_plot_click_signal_names_the_image(qtbot, plot, table):
    plot.show_scores(table, np.zeros(N, dtype=np.int8))
    points = plot.scatter.points()
    with qtbot.waitSignal(plot.imageClicked, timeout=1000) as got:
        plot.scatter.sigClicked.emit(plot.scatter, [points[6]], None)
    assert got.args == [6]
