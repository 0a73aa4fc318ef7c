"""Benchmark of decoding large JPEG photos at 1/8: reduced-size JPEG decode against full decode.

Not collected by the test run (file name does not start with ``test_``). Run it with

    .venv/bin/python tests/benchmarks/bench_large_photos.py [--quick] [--workdir DIR]
                     [--downscale 8] [--color rgb|gray] [--workers 2] [--repeat 1]

It writes 500 invented photos of 3000 rows x 4000 columns (``--quick``: the first 50 of them)
once into ``large-photos-3000x4000`` in the work folder (default: a ``modescope-bench`` folder
in the system temp folder); files already there are kept, so a quick run's files are reused by
a full one. Each photo is our own invention, seeded by its number: a smooth random colour
field, a few ellipses and rectangles, and a fine texture, saved as JPEG at quality 90; every
fifth one is stored upright (4000 rows x 3000 columns) with EXIF orientation 6, as cameras
write turned pictures, so it is analysed at the same size.

Then, in the same run and on the same files (read once before the timings, so both see the
operating system's file cache), it times decoding every photo through
``modescope.core.sources.decode.iter_blocks`` at the downscale (default 8):

* (a) the reduced-size path (``jpeg_draft=True``, the default): libjpeg decodes at 1/8;
* (b) the full-size path (``jpeg_draft=False``): full decode, then the area average;

and prints both times, the ratio (target: at least 3x) and the difference between the two
paths' values on a few photos. Run it on a quiet machine: on two shared cores the figures move
by a factor of two.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

ROWS, COLS = 3000, 4000
FULL, QUICK = 500, 50
TURNED_EVERY = 5          # every fifth photo is stored upright with EXIF orientation 6
FOLDER = f"large-photos-{ROWS}x{COLS}"


# -- the invented photos ---------------------------------------------------------------------
def invent_photo(index: int, rows: int = ROWS, cols: int = COLS) -> np.ndarray:
    """Return photo ``index`` as uint8, shape (rows, cols, 3): smooth field, shapes, texture."""
    from PIL import Image, ImageDraw

    rng = np.random.default_rng(1000 + index)
    # smooth random colour field: a coarse grid of random colours, upsampled (bicubic)
    coarse = rng.integers(40, 216, (6 + index % 5, 8 + index % 7, 3), dtype=np.uint8)
    img = Image.fromarray(coarse).resize((cols, rows), Image.Resampling.BICUBIC)
    draw = ImageDraw.Draw(img)
    for _ in range(int(rng.integers(3, 8))):
        top, left = int(rng.integers(0, rows - 200)), int(rng.integers(0, cols - 200))
        height, width = int(rng.integers(100, rows // 3)), int(rng.integers(100, cols // 3))
        colour = tuple(int(v) for v in rng.integers(0, 256, 3))
        box = (left, top, min(cols - 1, left + width), min(rows - 1, top + height))
        if rng.random() < 0.5:
            draw.ellipse(box, fill=colour)
        else:
            draw.rectangle(box, fill=colour)
    # fine texture: noise at a quarter of the size, upsampled, about +-12 levels
    grain = rng.normal(0.0, 6.0, (rows // 4, cols // 4)).astype(np.float32)
    grain = np.asarray(Image.fromarray(grain).resize((cols, rows), Image.Resampling.BILINEAR))
    photo = np.asarray(img, dtype=np.int16) + np.rint(grain).astype(np.int16)[:, :, None]
    return np.clip(photo, 0, 255).astype(np.uint8)


def _write_one(job) -> None:
    folder, index = job
    from PIL import Image

    from modescope.core.output.atomic import atomic_writer

    path = Path(folder) / f"photo_{index:04d}.jpg"
    if path.exists():
        return
    photo = invent_photo(index)
    exif = Image.Exif()
    if index % TURNED_EVERY == TURNED_EVERY - 1:
        photo = np.ascontiguousarray(np.rot90(photo, 1))   # stored upright; shown turned back
        exif[0x0112] = 6
    with atomic_writer(path, "wb", overwrite=True) as fh:
        Image.fromarray(photo).save(fh, format="JPEG", quality=90, exif=exif)


def make_photos(folder: Path, n: int) -> list[Path]:
    """Write the photos 0..n-1 that are not in ``folder`` yet; return the n paths."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = [folder / f"photo_{i:04d}.jpg" for i in range(n)]
    missing = [i for i, p in enumerate(paths) if not p.exists()]
    if missing:
        t = time.perf_counter()
        with ProcessPoolExecutor(2) as pool:
            list(pool.map(_write_one, [(str(folder), i) for i in missing], chunksize=4))
        print(f"  wrote {len(missing)} photos of {ROWS}x{COLS} into {folder} in "
              f"{time.perf_counter() - t:.1f} s", flush=True)
    return paths


# -- timings ---------------------------------------------------------------------------------
def read_bytes(paths: list[Path]) -> float:
    """Read every file once (so both timed paths find them in the file cache); return MB."""
    total = 0
    for p in paths:
        total += len(p.read_bytes())
    return total / 1e6


def time_decode(sset, downscale: int, workers: int, jpeg_draft: bool) -> tuple[float, int]:
    """Decode the whole collection through iter_blocks; return seconds and images decoded."""
    from modescope.core.sources.decode import iter_blocks

    t = time.perf_counter()
    done = 0
    for block in iter_blocks(sset, block_size=32, downscale=downscale, workers=workers,
                             jpeg_draft=jpeg_draft):
        if block.problems:
            raise SystemExit(f"decode failures: {block.problems[:3]}")
        done += block.data.shape[1]
    return time.perf_counter() - t, done


def compare(sset, downscale: int, count: int = 5) -> tuple[float, float]:
    """Largest and mean difference (8-bit levels) of the two paths over the first photos."""
    from modescope.core.sources.decode import load_image

    largest, means = 0.0, []
    for ref in sset.images[:count]:
        a = load_image(ref, sset, downscale)
        b = load_image(ref, sset, downscale, jpeg_draft=False)
        d = np.abs(a.astype(np.float64) - b) * 255
        largest = max(largest, float(d.max()))
        means.append(float(d.mean()))
    return largest, float(np.mean(means))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help=f"{QUICK} photos instead of {FULL}")
    ap.add_argument("--workdir", type=Path,
                    default=Path(tempfile.gettempdir()) / "modescope-bench")
    ap.add_argument("--downscale", type=int, default=8)
    ap.add_argument("--color", choices=("rgb", "gray"), default="rgb")
    ap.add_argument("--workers", type=int, default=2, help="decode threads (default 2)")
    ap.add_argument("--repeat", type=int, default=1,
                    help="timed rounds of (a) then (b); the best of each is reported")
    args = ap.parse_args(argv)

    import PIL
    from PIL import features

    from modescope.core.sources.scan import scan_sources

    n = QUICK if args.quick else FULL
    print(f"{n} invented JPEG photos {ROWS}x{COLS} (rows x cols), downscale {args.downscale}, "
          f"{args.color}, {args.workers} decode threads; Pillow {PIL.__version__}, "
          f"libjpeg-turbo {features.version('libjpeg_turbo')}, {os.cpu_count()} cores",
          flush=True)
    paths = make_photos(args.workdir / FOLDER, n)
    t = time.perf_counter()
    sset = scan_sources(paths, color=args.color)
    print(f"  scan (headers): {time.perf_counter() - t:.2f} s; analysed size "
          f"{sset.reference_size[0] // args.downscale}x{sset.reference_size[1] // args.downscale}")
    megabytes = read_bytes(paths)
    print(f"  files: {megabytes:.0f} MB, read once before the timings")

    reduced, full = [], []
    for _ in range(max(1, args.repeat)):
        seconds, done = time_decode(sset, args.downscale, args.workers, jpeg_draft=True)
        assert done == n
        reduced.append(seconds)
        seconds, done = time_decode(sset, args.downscale, args.workers, jpeg_draft=False)
        assert done == n
        full.append(seconds)
    a, b = min(reduced), min(full)
    print(f"  (a) reduced-size JPEG decode: {a:7.2f} s  ({n / a:6.1f} photos/s)")
    print(f"  (b) full decode + average:    {b:7.2f} s  ({n / b:6.1f} photos/s)")
    print(f"  ratio (b) / (a): {b / a:.1f}x (target: at least 3x)")
    largest, mean = compare(sset, args.downscale)
    print(f"  values, (a) against (b) on the first 5 photos: largest difference "
          f"{largest:.2f}, mean {mean:.2f} 8-bit levels")
    return 0


if __name__ == "__main__":
    sys.exit(main())
