"""The workbench's "Checked images" view: checking new images against the analysis shown.

Reference values: the view shows what core.review.check computes; its T² limit is compared with
the Phase II F formula evaluated with scipy.stats.f (Tracy, Young and Mason 1992), and the
residual map's peak with the place of a planted blob.
"""

from __future__ import annotations

import csv
import hashlib

import numpy as np
import pytest
from PIL import Image
from scipy import stats

from modescope.app.desktop.main_window import MainWindow
from modescope.app.desktop.views.checked import COLUMNS, HELP_TEXT, CheckedView
from modescope.core.engine.pipeline import AnalysisOptions, analyze
from modescope.core.output.images import signed_image_rgb
from modescope.core.output.model_file import save_model
from modescope.core.review.check import check_images

ROWS, COLS = 12, 16


def _write(folder, rng, count, blob=False, start=0):
    folder.mkdir(exist_ok=True)
    r, c = np.mgrid[0:ROWS, 0:COLS] / 11.0
    for i in range(count):
        v = 0.4 + 0.15 * rng.normal() * np.sin(3 * r) + 0.1 * rng.normal() * c
        v = v + 0.01 * rng.normal(size=v.shape)
        if blob:
            v = v + 0.4 * np.exp(-((r * 11 - 3) ** 2 + (c * 11 - 9) ** 2) / 2.0)
        Image.fromarray(np.clip(v * 255, 0, 255).round().astype(np.uint8)).save(
            folder / f"img_{start + i:03d}.png")


@pytest.fixture
def model_file(tmp_path):
    rng = np.random.default_rng(11)
    _write(tmp_path / "ref", rng, 50)
    _write(tmp_path / "new", rng, 4, start=100)
    _write(tmp_path / "new", rng, 2, blob=True, start=200)
    d = analyze([str(tmp_path / "ref")], AnalysisOptions(rank=5)).decomposition
    path = tmp_path / "model.npz"
    save_model(path, d)
    return path


@pytest.fixture
def window(qtbot, ini_settings, model_file):
    w = MainWindow(ini_settings, confirm_dialogs=False)
    qtbot.addWidget(w)
    w.resize(1280, 800)
    w.show()
    qtbot.waitExposed(w)
    assert w.open_analysis(str(model_file))
    w.state.set_rank(2)
    yield w
    w.close()


def _check(qtbot, view: CheckedView, sources):
    with qtbot.waitSignal(view.runner.finished, timeout=20000):
        assert view.check_sources(sources)


def test_checked_images_reach_the_table_the_plots_and_the_map(qtbot, window, model_file):
    before = hashlib.sha256(model_file.read_bytes()).hexdigest()
    view = window.views["checkedDock"]
    assert window.check_action.text().replace("&", "").startswith(
        "Check new images against this analysis")
    new = model_file.parent / "new"
    _check(qtbot, view, [str(new)])
    result = view.checked.result
    d = window.state.decomposition
    expected = check_images(d, [str(new)], rank=2)
    assert result.n_images == 6 and result.rank == 2
    np.testing.assert_allclose(result.table.q, expected.table.q)
    # the table: one row per image, the two blob images flagged (the beyond column says why)
    assert view.table.rowCount() == 6
    assert [view.table.horizontalHeaderItem(c).text() for c in range(6)] == list(COLUMNS)
    flagged = {view.table.item(r, 1).text() for r in range(6) if view.table.item(r, 5).text()}
    assert flagged == {"img_200.png", "img_201.png"}
    # the most unusual image is selected first, on the table's top row (as in Outliers)
    worst = int(np.argmax(result.table.score))
    assert view.checked.selected == worst and view.selected_row_index() == worst
    assert view.table.selectionModel().selectedRows()[0].row() == 0
    # the Phase II T² limit shown is the F formula (scipy.stats.f)
    n = d.n_images
    t2_limit = 2 * (n + 1) * (n - 1) / (n * (n - 2)) * stats.f.ppf(0.99, 2, n - 2)
    assert f"Phase II T² limit {t2_limit:.4g}" in view.summary.text()
    # weights plane: diamonds at the checked images' weights on the modes shown
    wv = window.views["weightsDock"]
    a, b = window.state.modes
    x, y = wv.checked_points.getData()
    np.testing.assert_allclose(x, result.weights[a])
    np.testing.assert_allclose(y, result.weights[b])
    # Q against T²: the checked points and the Phase II limit line
    plot = window.views["outliersDock"].plot_widget
    # the outlier view draws its own table after a throttled redraw: the diamonds come with it
    qtbot.waitUntil(lambda: len(plot.checked_values()[0]) == 6, timeout=10000)
    t2, q = plot.checked_values()
    np.testing.assert_allclose(t2, result.table.t2, rtol=1e-9)
    np.testing.assert_allclose(q, result.table.q, rtol=1e-9)
    assert plot.t2_new_line.isVisible()
    # the residual map of a blob image peaks at the blob
    blob = result.paths.index(str(new / "img_200.png"))
    for index in (next(i for i in range(6) if i not in (view.checked.selected, blob)), blob):
        with qtbot.waitSignal(view.map_runner.finished, timeout=10000):
            view.checked.set_selected(index)
    image = view.map_item.image
    assert image.shape == (ROWS, COLS, 3)
    values = view.map_values[..., 0]
    assert np.unravel_index(np.argmax(values), (ROWS, COLS)) == (3, 9)
    assert view.map_limit == pytest.approx(float(np.max(np.abs(values))))
    # drawn with the one colour rule of signed images (core.output.images)
    np.testing.assert_array_equal(image, signed_image_rgb(view.map_values, view.map_limit))
    heights = view.contributions.opts["height"]
    assert float(np.sum(heights)) == pytest.approx(result.table.t2[blob], rel=1e-9)
    assert hashlib.sha256(model_file.read_bytes()).hexdigest() == before


def test_rank_change_rescores_and_another_analysis_clears(qtbot, window, model_file):
    view = window.views["checkedDock"]
    _check(qtbot, view, [str(model_file.parent / "new")])
    window.state.set_rank(3)
    assert view.checked.result.rank == 3
    expected = check_images(window.state.decomposition, [str(model_file.parent / "new")],
                            rank=3)
    np.testing.assert_allclose(view.checked.result.table.t2, expected.table.t2, rtol=1e-9)
    window.state.set_decomposition(None)
    assert view.checked.result is None and view.table.rowCount() == 0
    x, _ = window.views["weightsDock"].checked_points.getData()
    assert len(x) == 0


def test_flagged_list_exports_to_csv_and_never_over_a_source(qtbot, window, model_file,
                                                             tmp_path):
    view = window.views["checkedDock"]
    _check(qtbot, view, [str(model_file.parent / "new")])
    out = view.export_flagged(str(tmp_path / "flagged.csv"))
    with open(out, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["path"].rsplit("/", 1)[-1] for r in rows] == ["img_200.png", "img_201.png"]
    assert all(r["flag"] == "1" for r in rows)
    source = model_file.parent / "new" / "img_100.png"
    before = hashlib.sha256(source.read_bytes()).hexdigest()
    assert view.export_flagged(str(source)) is None
    assert "source" in view.last_message
    assert hashlib.sha256(source.read_bytes()).hexdigest() == before


def test_cancel_keeps_what_was_read_and_bad_input_gives_a_message(qtbot, window, model_file,
                                                                  monkeypatch):
    import threading
    import time

    from modescope.app.desktop.views import checked as checked_module
    started = threading.Event()

    def after_cancel(d, sources, *, cancel, progress, **kw):
        started.set()
        # hold the job until Cancel is pressed, then let core see the flag between blocks
        deadline = time.monotonic() + 10
        while not cancel() and time.monotonic() < deadline:
            time.sleep(0.01)
        seen = []

        def first_block_only():
            return any(p.done > 0 for p in seen)
        return check_images(d, sources, block_size=2, progress=seen.append,
                            cancel=first_block_only, **kw)

    monkeypatch.setattr(checked_module, "check_images", after_cancel)
    view = window.views["checkedDock"]
    with qtbot.waitSignal(view.runner.cancelled, timeout=20000):
        assert view.check_sources([str(model_file.parent / "new")])
        assert started.wait(10)
        view.runner.cancel()
    assert view.last_message.startswith("Check stopped: 2 images scored before the stop")
    assert view.table.rowCount() == 2
    monkeypatch.undo()
    with qtbot.waitSignal(view.runner.failed, timeout=20000):
        view.check_sources([str(model_file.parent / "no_such_folder")])
    assert "no_such_folder" in view.last_message
    window.state.set_decomposition(None)
    assert not view.check_sources([str(model_file.parent / "new")])
    assert "analysis first" in view.last_message


def test_help_text_says_what_a_flag_is(window):
    view = window.views["checkedDock"]
    assert view.help_label.text() == HELP_TEXT
    assert "not a verdict on a part, a sample or a person" in HELP_TEXT
    assert "reference images were normal" in HELP_TEXT

