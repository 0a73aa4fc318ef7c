"""Benchmark the Dask engine against the local engine on the same files: time and peak memory.

Not collected by the test run (file name does not start with ``test_``). Run it on a quiet
machine with

    .venv/bin/python tests/benchmarks/bench_dask.py [--images N] [--side S] [--rank K]
                                                    [--scheduler ADDRESS] [--workdir DIR]

Collection: N (default 5,000) invented gray S x S (default 128) PNGs of a low-rank-plus-noise
model (20 smooth random patterns with amplitudes from 10 down to 1 grey level, Gaussian noise
of 3 grey levels, around grey level 128), written once into the work folder (default: a
``modescope-bench`` folder in the system temp folder).

Methods, each in its own child process after one read of every file (warm page cache):

* ``local``: :func:`modescope.core.engine.pipeline.analyze` with the command line's options;
* ``dask``: :func:`modescope.core.engine.cluster.analyze_on_cluster` on a local cluster of two
  worker processes with one thread each (what ``modescope analyze --engine dask`` starts), or
  on ``--scheduler ADDRESS`` when given (its workers' memory is then not measured);
* ``dask-threads``: the same with the two workers as threads of the child process.

Printed per method: the time of the analysis (cluster start-up included, imports excluded),
the peak resident memory of the child and of its whole process tree (sampled every 20 ms with
psutil, so the workers count), the passes over the data, and the largest relative difference
of the singular values from the local engine's; then one JSON line with every figure.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

MODES = 20
NOISE = 3.0
SEED = 20261203


def write_collection(folder: Path, n: int, side: int) -> None:
    """Write the invented collection once (a marker file records that it is complete)."""
    from PIL import Image

    marker = folder / ".complete"
    if marker.exists():
        return
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    freq = np.fft.rfftfreq(side)[None, :] ** 2 + np.fft.fftfreq(side)[:, None] ** 2
    low = np.exp(-freq * 400.0)
    patterns = np.array([np.fft.irfft2(np.fft.rfft2(rng.standard_normal((side, side))) * low,
                                       s=(side, side)) for _ in range(MODES)])
    patterns /= patterns.std(axis=(1, 2), keepdims=True)
    amps = np.geomspace(10.0, 1.0, MODES)
    for i in range(n):
        img = 128 + np.tensordot(rng.standard_normal(MODES) * amps, patterns, axes=1)
        img += rng.normal(0, NOISE, (side, side))
        Image.fromarray(np.clip(np.round(img), 0, 255).astype(np.uint8)).save(
            folder / f"img_{i:06d}.png")
    marker.write_text("ok\n")


class TreePeak:
    """Sample the resident memory of this process and its children (the workers)."""

    def __init__(self):
        import psutil
        self.me, self.peak, self.stop = psutil.Process(), 0, threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        import psutil
        while not self.stop.is_set():
            total = 0
            try:
                procs = [self.me] + self.me.children(recursive=True)
                for p in procs:
                    try:
                        total += p.memory_info().rss
                    except psutil.Error:
                        pass
            except psutil.Error:
                pass
            self.peak = max(self.peak, total)
            time.sleep(0.02)

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.stop.set()
        self.thread.join()


def vm_hwm() -> float:
    """Peak resident memory of this process in MB (VmHWM)."""
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def child(method: str, folder: str, rank: int, scheduler: str | None) -> None:
    """Run one method and print one JSON line."""
    from modescope.core.engine.cluster import analyze_on_cluster
    from modescope.core.engine.pipeline import AnalysisOptions, analyze

    options = AnalysisOptions(rank=rank, pass_blas_threads=os.cpu_count() or 1)
    with TreePeak() as tree:
        start = time.perf_counter()
        if method == "local":
            d = analyze([folder], options).decomposition
            reads = 1 + d.metadata["refinement"]["passes"]
        else:
            d = analyze_on_cluster([folder], options, scheduler=scheduler,
                                   local_processes=method == "dask").decomposition
            reads = d.metadata["engine"]["passes_over_data"]
        seconds = time.perf_counter() - start
    print(json.dumps({"method": method, "seconds": seconds, "peak_mb": vm_hwm(),
                      "tree_peak_mb": tree.peak / 2 ** 20, "reads": reads,
                      "singular_values": d.singular_values.tolist()}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=5000)
    parser.add_argument("--side", type=int, default=128)
    parser.add_argument("--rank", type=int, default=20)
    parser.add_argument("--scheduler", default=None)
    parser.add_argument("--workdir", default=os.path.join(tempfile.gettempdir(),
                                                          "modescope-bench"))
    parser.add_argument("--child", default=None, help=argparse.SUPPRESS)
    parser.add_argument("--folder", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.child, args.folder, args.rank, args.scheduler)
        return
    folder = Path(args.workdir) / f"dask-gray{args.side}-n{args.images}-seed{SEED}"
    write_collection(folder, args.images, args.side)
    for p in folder.glob("*.png"):              # warm the page cache
        p.read_bytes()
    rows = []
    for method in ("local", "dask", "dask-threads"):
        command = [sys.executable, __file__, "--child", method, "--folder", str(folder),
                   "--rank", str(args.rank)]
        if args.scheduler and method != "local":
            command += ["--scheduler", args.scheduler]
        out = subprocess.run(command, check=True, capture_output=True, text=True).stdout
        rows.append(json.loads(out.strip().splitlines()[-1]))
    ref = np.array(rows[0]["singular_values"])
    print(f"{args.images} gray {args.side}x{args.side} PNG, rank {args.rank}")
    print(f"{'method':<13} {'time s':>8} {'peak MB':>8} {'tree MB':>8} {'reads':>5} "
          f"{'sv diff':>9}")
    for row in rows:
        diff = float(np.max(np.abs(np.array(row["singular_values"]) - ref) / ref))
        row["sv_difference"] = diff
        print(f"{row['method']:<13} {row['seconds']:8.2f} {row['peak_mb']:8.0f} "
              f"{row['tree_peak_mb']:8.0f} {row['reads']:5d} {diff:9.1e}")
    print(json.dumps({"images": args.images, "side": args.side, "rank": args.rank,
                      "results": [{k: v for k, v in r.items() if k != "singular_values"}
                                  for r in rows]}))


if __name__ == "__main__":
    main()
