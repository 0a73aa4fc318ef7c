"""Benchmark of the workbench: one rank-slider step, and time from Start to the first partial
basis on screen.

Not collected by the test run. Run it with

    .venv/bin/python tests/benchmarks/bench_workbench.py [--images 10000] [--workdir DIR]

1. Rank-slider step at 512x512 RGB, k = 200 (target under 10 ms): a synthetic decomposition
   (random unit basis columns; timing does not depend on orthogonality) and the inspector of the
   real program offscreen. Printed: the median of the core's incremental reconstruction step, the
   median of the inspector's whole repaint for one step (reconstruction, residual colour map,
   QImage conversion), and, for comparison, the direct formula ``mean + U_r w_r``.
2. Start to first partial basis on screen for a generated collection (default 10,000 demo frames
   of 96x128, written once into the work folder): the main window offscreen, the clock started
   when Start is pressed and stopped when the basis gallery has drawn its first tiles of a partial
   analysis (target under 1 s).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import numpy as np


def slider_step(k=200, shape=(512, 512, 3), steps=60):
    from PySide6.QtWidgets import QApplication
    from modescope.app.desktop.views.inspector import Inspector
    from modescope.app.desktop.state import AppState
    from modescope.core.decomposition import Decomposition
    from modescope.core.review.reconstruct import LiveReconstruction

    app = QApplication.instance() or QApplication([])
    pixels = int(np.prod(shape))
    rng = np.random.default_rng(0)
    basis = rng.standard_normal((k, pixels), dtype=np.float32)
    basis /= np.linalg.norm(basis, axis=1, keepdims=True)
    basis = basis.T                                  # pixels x k, each column contiguous
    sv = np.sort(rng.random(k))[::-1] * 100
    weights = rng.standard_normal((k, 20)) * sv[:, None] / 10
    mean = np.full(pixels, 0.5, dtype=np.float32)
    d = Decomposition(mean=mean, basis=basis, singular_values=sv, weights=weights,
                      total_energy=float(np.sum(sv ** 2) * 1.1), image_shape=shape,
                      residual=np.ones(20), exact=True)
    live = LiveReconstruction(d, 3)
    live.at(100)
    ranks = [100 + (i % 2) for i in range(steps)]    # back and forth by one step
    core_t = []
    for r in ranks:
        t = time.perf_counter()
        live.at(r)
        core_t.append(time.perf_counter() - t)
    direct_t = []
    for r in ranks[:20]:
        t = time.perf_counter()
        d.reconstruct(3, r)
        direct_t.append(time.perf_counter() - t)

    state = AppState()
    source = np.clip(d.reconstruct(3, k).reshape(shape), 0, 1)
    inspector = Inspector(state, load_image=lambda dec, i: source)
    inspector.resize(1000, 600)
    inspector.show()
    state.set_decomposition(d)
    state.set_selected(3)
    state.set_rank(100)
    app.processEvents()
    gui_t = []
    for r in ranks:
        t = time.perf_counter()
        state.set_rank(r)                            # what the debounced slider does
        app.processEvents()
        gui_t.append(time.perf_counter() - t)
    inspector.close()
    ms = lambda v: 1000 * statistics.median(v)
    print(f"rank-slider step, 512x512 RGB, k = {k}:")
    print(f"  core incremental step (median of {steps}):     {ms(core_t):7.2f} ms")
    print(f"  inspector repaint for one step (median):      {ms(gui_t):7.2f} ms   target < 10 ms")
    print(f"  direct formula mean + U_r w_r at r ~ 100:      {ms(direct_t):7.2f} ms (not used)")


def first_partial(n_images: int, workdir: Path):
    from PySide6.QtWidgets import QApplication
    from modescope.app.desktop.main_window import MainWindow
    from modescope.app.desktop.settings import Settings
    from modescope.core.demo import write_collection
    from PySide6.QtCore import QSettings

    folder = workdir / f"tray_{n_images}"
    marker = folder / ".complete"
    if not marker.exists():
        t = time.perf_counter()
        if folder.exists():
            for p in folder.iterdir():
                p.unlink()
        write_collection(folder, n_images, size=(96, 128), workers=2, overwrite=True)
        marker.write_text("ok")
        print(f"  wrote {n_images} frames in {time.perf_counter() - t:.1f} s into {folder}")
    app = QApplication.instance() or QApplication([])
    for mode in ("after the pane's scan", "straight away"):
        ini = Path(tempfile.mkdtemp()) / "bench.ini"
        window = MainWindow(Settings(QSettings(str(ini), QSettings.Format.IniFormat)),
                            confirm_dialogs=False)
        window.resize(1280, 800)
        window.show()
        app.processEvents()
        gallery = window.views["basisDock"]
        options = window.ingest.options()
        if mode.startswith("after"):
            # the usual flow: the user adds the folder, the pane counts the images, then Start
            window.ingest.set_sources([str(folder)])
            t = time.perf_counter()
            while window.ingest.scanned_for([str(folder)], window.ingest.options()) is None:
                app.processEvents()
                time.sleep(0.002)
                if time.perf_counter() - t > 60:
                    raise SystemExit("the pane's scan did not finish")
            options = window.ingest.options()
        t0 = time.perf_counter()
        window.start_analysis([str(folder)], options)
        first = None
        n_first = 0
        while time.perf_counter() - t0 < 120:
            app.processEvents()
            d = window.state.decomposition
            if first is None and d is not None and \
                    gallery.model.rowCount() > 1:
                first = time.perf_counter() - t0
                n_first = d.n_images
            if not window.runner.is_running() and first is not None:
                break
            time.sleep(0.002)
        total = time.perf_counter() - t0
        window.shutdown()
        window.close()
        print(f"Start to first partial basis on screen, {n_images} images, Start {mode}: "
              f"{first:.3f} s (partial of {n_first} images)   target < 1 s")
        print(f"  whole analysis in the workbench: {total:.1f} s")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="workbench benchmark")
    ap.add_argument("--images", type=int, default=10_000)
    ap.add_argument("--workdir", type=Path,
                    default=Path(tempfile.gettempdir()) / "modescope-bench")
    args = ap.parse_args(argv)
    args.workdir.mkdir(parents=True, exist_ok=True)
    slider_step()
    first_partial(args.images, args.workdir)
    return 0


if __name__ == "__main__":
    sys.exit(main())
