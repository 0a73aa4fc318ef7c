"""Benchmark of ``check_images``: scoring new images against a frozen model, against the decode
floor (decoding the same files through ``iter_blocks`` and nothing else).

Not collected by the test run (file name does not start with ``test_``). Run it with

    .venv/bin/python tests/benchmarks/bench_check.py [--quick] [--workdir DIR] [--rank 50]

It writes invented demo frames of one scene (``modescope.core.demo``: 7,000 gray 128x128 PNGs;
``--quick``: 500 of 32x40) once into the work folder (default: a ``modescope-bench`` folder in
the system temp folder), analyses every other frame of the first 4,000 (``--quick``: 400) as the
reference, checks the last 3,000 (100) as new images, and
times, on the same new files (read once before the timings, so both see the file cache):

* the decode floor: ``iter_blocks`` over the new files with the model's options;
* ``check_images`` at the model's rank (decode + one projection per block, no SVD).

The target is "decoding speed": the ratio check / floor close to 1. Run it on a quiet machine:
on two shared cores the figures move by a factor of two.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path


def _collection(folder: Path, count: int, size, seed: int) -> Path:
    from modescope.core import demo

    if not folder.exists() or len(list(folder.glob("*.png"))) < count:
        folder.mkdir(parents=True, exist_ok=True)
        demo.write_collection(folder, count, size=size, seed=seed, fmt="png")
    return folder


def main(argv=None) -> int:
    """Run the benchmark and print the figures; return 0."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a small collection, to try it")
    parser.add_argument("--workdir", default=os.path.join(tempfile.gettempdir(),
                                                          "modescope-bench"))
    parser.add_argument("--rank", type=int, default=50)
    args = parser.parse_args(argv)

    from modescope.core.engine.pipeline import AnalysisOptions, analyze
    from modescope.core.review.check import check_images
    from modescope.core.sources.decode import iter_blocks
    from modescope.core.sources.scan import scan_sources

    size, n_first, n_new = ((32, 40), 400, 100) if args.quick else ((128, 128), 4000, 3000)
    tag = f"{size[0]}x{size[1]}"
    folder = _collection(Path(args.workdir) / f"check-{tag}-{n_first + n_new}",
                         n_first + n_new, size, seed=1)
    from modescope.core.sources.scan import natural_key
    files = sorted((str(p) for p in folder.glob("*.png")), key=natural_key)
    ref, new = files[:n_first:2], files[n_first:n_first + n_new]
    rank = min(args.rank, len(ref) - 2)
    model = analyze(ref, AnalysisOptions(rank=rank, color="gray")).decomposition
    for p in new:                                    # warm the file cache for both timings
        Path(p).read_bytes()

    start = time.perf_counter()
    found = scan_sources(new, color="gray")
    for _ in iter_blocks(found, block_size=64, workers=2):
        pass
    floor = time.perf_counter() - start

    start = time.perf_counter()
    result = check_images(model, new, rank=rank)
    checked = time.perf_counter() - start

    print(f"{result.n_images:,} new gray {tag} PNGs against a model of {model.n_images:,} "
          f"images, rank {rank}")
    print(f"decode floor (scan + iter_blocks): {floor:.2f} s")
    print(f"check_images:                      {checked:.2f} s  ({checked / floor:.2f}x the "
          f"floor; {result.n_flagged} flagged)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
