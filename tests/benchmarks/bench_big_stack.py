"""Memory benchmark: analyse a large NumPy ``.npy`` stack and compare peak memory to its size.

Not collected by the test run (file name does not start with ``test_``). This is a memory
measure, not a timing one (the time is printed only so a run can be recognised as healthy):

    .venv/bin/python tests/benchmarks/bench_big_stack.py [--gb 2] [--side 256] [--rank 10]
        [--workdir DIR] [--keep]

The stack is ``(frames, side, side)`` uint8, ``--gb`` GiB in all (default 2 GiB: 32,768 frames
of 256 x 256), written once into the work folder (default: a ``modescope-bench`` folder in the
system temp folder) with plain file writes, frame chunk by chunk (never held in memory whole).
Its frames are an invented travelling wave (two patterns in quadrature, so a pair of modes)
plus a slow drift and uniform noise of 8 grey levels, seeded.

The analysis (``modescope.core.engine.pipeline.analyze`` with ``AnalysisOptions(rank=k)`` and
otherwise default options) runs in its own child process; the child reports its peak resident
memory (``VmHWM`` from ``/proc/self/status``, which counts the stack's mapped pages while they
are resident, and ``ru_maxrss`` as a check) and its resident memory after the imports. Printed:
file size, peak, peak over file size, and the leading singular values (the travelling pair
should show as two nearly equal values).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SEED = 20261203
CHUNK = 256                          # frames generated and written per step


def status_kb(field: str) -> int:
    """Return a ``/proc/self/status`` field in kB (0 when not on Linux)."""
    try:
        with open("/proc/self/status") as handle:
            for line in handle:
                if line.startswith(field + ":"):
                    return int(line.split()[1])
    except OSError:
        pass
    return 0


def frames_chunk(start: int, count: int, side: int, period: float) -> np.ndarray:
    """Frames ``start .. start + count`` of the invented sequence, uint8."""
    rng = np.random.default_rng([SEED, start])
    r, c = np.mgrid[0:side, 0:side].astype(np.float32) / side
    cos_p, sin_p = np.cos(2 * np.pi * 3 * c), np.sin(2 * np.pi * 3 * c)
    t = np.arange(start, start + count, dtype=np.float32)[:, None, None]
    phase = 2 * np.pi * t / period
    wave = 60 * (np.cos(phase) * cos_p + np.sin(phase) * sin_p)
    drift = 20 * (t / (t.max() + 1)) * r
    noise = rng.integers(0, 8, size=(count, side, side), dtype=np.uint8)
    return np.clip(120 + wave + drift, 0, 247).astype(np.uint8) + noise


def write_stack(path: Path, n_frames: int, side: int) -> None:
    """Write the stack with a .npy header and plain writes (a temporary name, then renamed)."""
    header = {"descr": np.lib.format.dtype_to_descr(np.dtype(np.uint8)),
              "fortran_order": False, "shape": (n_frames, side, side)}
    partial = path.with_name(path.name + ".partial")
    with open(partial, "wb") as handle:
        np.lib.format.write_array_header_1_0(handle, header)
        for start in range(0, n_frames, CHUNK):
            count = min(CHUNK, n_frames - start)
            handle.write(frames_chunk(start, count, side, period=50.0).tobytes())
    os.replace(partial, path)


def child(path: str, rank: int) -> None:
    """Analyse ``path`` and print one JSON line with memory and results."""
    from modescope.core.engine.pipeline import AnalysisOptions, analyze

    after_imports = status_kb("VmRSS")
    start = time.perf_counter()
    result = analyze([path], AnalysisOptions(rank=rank))
    seconds = time.perf_counter() - start
    d = result.decomposition
    print(json.dumps({
        "images": int(d.n_images), "seconds": seconds,
        "peak_kb": status_kb("VmHWM"), "after_imports_kb": after_imports,
        "ru_maxrss_kb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
        "singular_values": [float(v) for v in d.singular_values[:6]],
        "problems": len(result.problems)}))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--gb", type=float, default=2.0, help="stack size in GiB (default 2)")
    parser.add_argument("--side", type=int, default=256, help="frame side in pixels")
    parser.add_argument("--rank", type=int, default=10)
    parser.add_argument("--workdir", default=os.path.join(tempfile.gettempdir(),
                                                          "modescope-bench"))
    parser.add_argument("--keep", action="store_true", help="keep the stack afterwards")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        child(args.child, args.rank)
        return 0
    n_frames = max(1, int(args.gb * 2 ** 30) // (args.side * args.side))
    work = Path(args.workdir)
    work.mkdir(parents=True, exist_ok=True)
    path = work / f"stack_{n_frames}x{args.side}x{args.side}.npy"
    if not path.exists():
        print(f"writing {path} ({n_frames} frames of {args.side}x{args.side}) ...", flush=True)
        write_stack(path, n_frames, args.side)
    size = path.stat().st_size
    run = subprocess.run([sys.executable, __file__, "--child", str(path), "--rank",
                          str(args.rank)], capture_output=True, text=True, check=False)
    if run.returncode != 0:
        print(run.stderr, file=sys.stderr)
        return run.returncode
    report = json.loads(run.stdout.strip().splitlines()[-1])
    peak = report["peak_kb"] * 1024
    print(f"stack: {size / 2 ** 30:.2f} GiB ({size:,} bytes), {report['images']} frames of "
          f"{args.side}x{args.side}, rank {args.rank}")
    print(f"analysis: {report['seconds']:.1f} s; peak resident memory {peak / 2 ** 20:.0f} MiB "
          f"(VmHWM; ru_maxrss {report['ru_maxrss_kb'] / 1024:.0f} MiB; "
          f"{report['after_imports_kb'] / 1024:.0f} MiB after the imports) = "
          f"{100 * peak / size:.1f}% of the file size")
    print("leading singular values: " + ", ".join(f"{v:.1f}" for v in
                                                  report["singular_values"]))
    if not args.keep:
        path.unlink()
    return 0


if __name__ == "__main__":
    sys.exit(main())
