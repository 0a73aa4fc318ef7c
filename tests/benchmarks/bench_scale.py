"""Benchmark of scale: time and peak memory of `modescope analyze` at two or more collection
sizes, and how much peak memory grows per image beyond the weights.

Not collected by the test run (file name does not start with ``test_``). Run it on a quiet
machine with

    .venv/bin/python tests/benchmarks/bench_scale.py [--sizes 10000,100000] [--side 64]
        [--rank 50] [--quick] [--million] [--workdir DIR]

Targets: peak memory grows by at most 1 KB per image beyond the weights, and time grows
linearly with the number of images.

Collections: invented gray PNGs of a low-rank-plus-noise model (20 smooth random patterns with
geometrically decaying amplitudes, per-image standard normal coefficients, Gaussian pixel noise
of 3 grey levels, a mean of grey level 128, rounded and clipped to uint8), one folder per size,
written once into the work folder (default: a ``modescope-bench`` folder in the system temp
folder) by two writer processes. Every size is analysed by ``modescope.core.analyze`` with
``AnalysisOptions(rank=k)`` and otherwise default options in its own child process, the page
cache warmed by one read of every file first. Printed for each size: the time of the analysis
(after the imports), images per second, and the peak resident memory of that process
(``VmHWM`` from ``/proc/self/status``) and its resident memory after the imports. Between the
smallest and the largest size:

    growth per image = (peak_big - peak_small) / (n_big - n_small) - 8 k bytes

i.e. the growth beyond the final float64 weights (k x images, 8 k bytes per image), and the time
per image of the largest size relative to the smallest (1.0 is linear).

Sizes: ``--sizes`` (default 10,000 and 100,000 at ``--side 64``); ``--quick``: 2,000 and 20,000;
``--million``: the recorded 1,000,000-image run at 32x32, with a 100,000-image run at 32x32 as
the small size of the growth figure. ``--million`` writes about a million files (about 4 GB on a
file system with 4 KB blocks) and refuses to start unless the work folder has at least 10 GB and
1.1 million inodes free (checked only when that collection is not written yet).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

MODES = 20
NOISE = 3.0
SEED = 20261203
CHUNK = 1000                   # images per writer task; the random stream is per chunk
GENERATOR = f"scale v1 modes={MODES} noise={NOISE} seed={SEED} chunk={CHUNK}"
MIN_FREE_BYTES = 10 * 10 ** 9
MIN_FREE_INODES = 1_100_000

_MODEL = {}


def _model(side: int):
    """Return (orthonormal patterns x amplitudes, MODES x pixels) for images of ``side``."""
    if side not in _MODEL:
        rng = np.random.default_rng((SEED, side))
        f = np.fft.fftfreq(side)
        lowpass = np.exp(-(f[:, None] ** 2 + f[None, :] ** 2) / (2 * (4 / side) ** 2))
        fields = [np.fft.ifft2(np.fft.fft2(rng.standard_normal((side, side))) * lowpass).real
                  for _ in range(MODES)]
        q, _ = np.linalg.qr(np.stack([x.ravel() for x in fields], axis=1))
        amps = 10.0 * (0.8 / 10.0) ** (np.arange(MODES) / (MODES - 1))
        _MODEL[side] = (q * side * amps).T            # RMS of pattern j: amps[j] grey levels
    return _MODEL[side]


def _write_chunk(args):
    folder, side, start, stop = args
    from PIL import Image
    patterns = _model(side)
    rng = np.random.default_rng((SEED, side, start))
    m = stop - start
    x = rng.standard_normal((m, MODES)) @ patterns
    x += NOISE * rng.standard_normal(x.shape)
    x += 128.0
    np.rint(x, out=x)
    pixels = np.clip(x, 0, 255).astype(np.uint8).reshape(m, side, side)
    for j in range(m):
        Image.fromarray(pixels[j], mode="L").save(Path(folder) / f"img_{start + j:07d}.png",
                                                  format="PNG")
    return m


def _free_space(folder: Path) -> tuple[int, int]:
    """Return (free bytes, free inodes) of the file system that holds ``folder``."""
    probe = folder
    while not probe.exists():
        probe = probe.parent
    st = os.statvfs(probe)
    return shutil.disk_usage(probe).free, st.f_favail


def is_written(folder: Path, n: int, side: int) -> bool:
    """Return True when ``folder`` already holds this collection (its marker file says so)."""
    done = folder / ".complete"
    return done.exists() and done.read_text() == f"{n} {side} {GENERATOR}"


def space_refusal(folder: Path) -> str | None:
    """Return why a million files cannot go into ``folder``'s file system, or None if they can.

    Parameters
    ----------
    folder : Path
        The folder (it need not exist yet; its nearest existing parent is checked).

    Returns
    -------
    str or None
        The message when fewer than 10 GB or 1.1 million inodes are free.
    """
    free, inodes = _free_space(folder)
    if free >= MIN_FREE_BYTES and inodes >= MIN_FREE_INODES:
        return None
    return (f"refusing to write about a million files into {folder}: its file system has "
            f"{free / 1e9:.1f} GB and {inodes:,} inodes free, at least "
            f"{MIN_FREE_BYTES / 1e9:.0f} GB and {MIN_FREE_INODES:,} inodes are needed; "
            f"free some space or pass --workdir on another disk")


def make_collection(folder: Path, n: int, side: int) -> Path:
    """Write n invented side x side gray PNGs into ``folder`` once.

    Parameters
    ----------
    folder : Path
    n : int
        Number of images.
    side : int
        Image width and height in pixels.

    Returns
    -------
    Path
        ``folder``.
    """
    if is_written(folder, n, side):
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    for p in folder.iterdir():
        p.unlink()
    t = time.perf_counter()
    jobs = [(str(folder), side, s, min(s + CHUNK, n)) for s in range(0, n, CHUNK)]
    with ProcessPoolExecutor(2) as pool:
        written = sum(pool.map(_write_chunk, jobs))
    (folder / ".complete").write_text(f"{n} {side} {GENERATOR}")
    print(f"  wrote {written:,} gray {side}x{side} PNG in {time.perf_counter() - t:.1f} s "
          f"into {folder}", flush=True)
    return folder


def warm_cache(folder: Path) -> None:
    """Read every file once so that every run finds the files in the page cache."""
    with os.scandir(folder) as it:
        for entry in it:
            if entry.name.endswith(".png"):
                with open(entry.path, "rb") as f:
                    f.read()


CHILD = r"""
import json, sys, time

def _mb(field):
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024
    return float("nan")

from modescope.core import AnalysisOptions, analyze
folder, rank = sys.argv[1], int(sys.argv[2])
base = _mb("VmRSS")
t = time.perf_counter()
opts = AnalysisOptions(rank=rank)
d = analyze([folder], opts).decomposition
seconds = time.perf_counter() - t
print(json.dumps({"seconds": seconds, "peak_mb": _mb("VmHWM"), "base_mb": base,
                  "images": d.n_images, "refinement": d.metadata.get("refinement")}))
"""


def run_size(folder: Path, rank: int) -> dict:
    """Analyse ``folder`` in a fresh interpreter; return its report.

    Parameters
    ----------
    folder : Path
    rank : int
        k of the analysis.

    Returns
    -------
    dict
        seconds, peak_mb, base_mb (resident after the imports), images, refinement,
        process_s (the child's whole wall time).

    Raises
    ------
    SystemExit
        If the child fails.
    """
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", CHILD, str(folder), str(rank)],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"analysis of {folder} failed:\n{proc.stderr}")
    report = json.loads(proc.stdout.strip().splitlines()[-1])
    report["process_s"] = time.perf_counter() - t
    return report


def _sizes(text: str) -> list[int]:
    try:
        sizes = sorted({int(s.replace("_", "")) for s in text.split(",") if s.strip()})
    except ValueError:
        raise argparse.ArgumentTypeError(f"--sizes must be comma-separated whole numbers, "
                                         f"got {text!r}") from None
    if not sizes or sizes[0] < 100:
        raise argparse.ArgumentTypeError(f"--sizes must list sizes of at least 100 images, "
                                         f"got {text!r}")
    return sizes


def main(argv=None) -> int:
    """Run the benchmark; print a table and one JSON line. Returns the exit code."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", type=_sizes, help="comma-separated collection sizes "
                    "(default 10000,100000)")
    ap.add_argument("--side", type=int, help="image side in pixels (default 64)")
    ap.add_argument("--rank", type=int, default=50, help="k (default 50)")
    ap.add_argument("--quick", action="store_true", help="sizes 2,000 and 20,000")
    ap.add_argument("--million", action="store_true",
                    help="100,000 and 1,000,000 images of 32x32 (writes about a million files)")
    ap.add_argument("--workdir", type=Path,
                    default=Path(tempfile.gettempdir()) / "modescope-bench")
    args = ap.parse_args(argv)
    if args.quick and args.million:
        ap.error("--quick and --million exclude each other")
    if args.rank < 1:
        ap.error(f"--rank must be at least 1, got {args.rank}")
    side = args.side or (32 if args.million else 64)
    if side < 4:
        ap.error(f"--side must be at least 4, got {side}")
    sizes = args.sizes or ([2000, 20000] if args.quick else
                           [100_000, 1_000_000] if args.million else [10_000, 100_000])
    folders = [args.workdir / f"scale{side}_{n}" for n in sizes]
    # checked before anything is written, so that a refusal leaves no half-made collection
    if any(n >= 500_000 and not is_written(f, n, side) for n, f in zip(sizes, folders)):
        refusal = space_refusal(args.workdir)
        if refusal:
            print(refusal, file=sys.stderr)
            return 2
    print(f"generating the collections (once; cached in {args.workdir})", flush=True)
    for n, folder in zip(sizes, folders):
        make_collection(folder, n, side)
    runs = []
    for n, folder in zip(sizes, folders):
        t = time.perf_counter()
        warm_cache(folder)
        print(f"  page cache warmed for {n:,} files in {time.perf_counter() - t:.1f} s",
              flush=True)
        r = run_size(folder, args.rank)
        r["n"] = n
        runs.append(r)
        print(f"  {n:>9,} images: {r['seconds']:8.2f} s, peak {r['peak_mb']:8.0f} MB",
              flush=True)
    return report(runs, side, args.rank)


def report(runs: list, side: int, rank: int) -> int:
    """Print the table, the growth figures and the JSON line."""
    print(f"\ngray {side}x{side} PNG, k = {rank}")
    print(f"{'images':>10s} {'time s':>9s} {'images/s':>10s} {'peak MB':>9s} "
          f"{'after imports MB':>17s} {'passes':>7s}")
    for r in runs:
        r["images_per_s"] = r["images"] / r["seconds"]
        passes = (r["refinement"] or {}).get("passes", "-")
        print(f"{r['n']:>10,} {r['seconds']:9.2f} {r['images_per_s']:10,.0f} "
              f"{r['peak_mb']:9.0f} {r['base_mb']:17.0f} {passes!s:>7s}")
    line = {"benchmark": "bench_scale", "side": side, "k": rank,
            "runs": [{k: r[k] for k in ("n", "images", "seconds", "process_s", "images_per_s",
                                        "peak_mb", "base_mb", "refinement")} for r in runs]}
    if len(runs) >= 2:
        small, big = runs[0], runs[-1]
        dn = big["images"] - small["images"]
        per_image = (big["peak_mb"] - small["peak_mb"]) * 2 ** 20 / dn
        beyond = per_image - 8 * rank
        linear = (big["seconds"] / big["images"]) / (small["seconds"] / small["images"])
        print(f"peak memory growth {small['images']:,} -> {big['images']:,} images: "
              f"{per_image:,.0f} bytes/image, {beyond:,.0f} bytes/image beyond the weights "
              f"(8k = {8 * rank} bytes)   (target <= 1024)")
        print(f"time per image at {big['images']:,} relative to {small['images']:,}: "
              f"{linear:.2f}   (1.00 = linear)")
        line.update({"growth_bytes_per_image": per_image,
                     "growth_beyond_weights_bytes_per_image": beyond,
                     "time_per_image_ratio": linear,
                     "targets": {"growth_beyond_weights_bytes_per_image": "<= 1024",
                                 "time_per_image_ratio": "~1 (linear)"}})
    print(json.dumps(line))
    return 0


if __name__ == "__main__":
    sys.exit(main())
